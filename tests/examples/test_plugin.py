"""The example plug-in stage (examples/plugin) is found through rehear's entry-point group.

`make test` installs the package (pip install -e examples/plugin); this test fails, rather than
skips, when it is missing, since then the entry-point path is not tested at all.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

import pytest

from relay.core.config import build_chain, parse_config
from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.core.testing import make_utterance, run_checked, test_context
from relay.core.yamlsource import load_yaml
from tests.paths import EXAMPLES


@pytest.fixture(autouse=True)
def _installed() -> None:
    try:
        version("rehear-fillers")
    except PackageNotFoundError:
        pytest.fail(f"the example plug-in is not installed: pip install -e {EXAMPLES / 'plugin'} (make test does)")


def test_the_plugin_stage_comes_from_its_entry_point(tmp_path: Path) -> None:
    cls = Registry().get("strip_fillers")
    assert cls.__module__ == "rehear_fillers.stage"
    stage = cls(cls.Settings.model_validate({}), context=test_context(tmp_path))
    stage.load()
    result = run_checked(stage, make_utterance(["book the uh lathe", "book the lathe", "look the um lathe"],
                                               [0.5, 0.3, 0.2]))
    assert [h.text for h in result.nbest] == ["book the lathe", "look the lathe"]
    assert result.nbest[0].posterior == pytest.approx(0.8)  # two readings merged, probability summed


def test_a_relay_configuration_names_the_plugin_and_validates_its_settings(tmp_path: Path) -> None:
    text = "stages:\n  - normalize\n  - strip_fillers:\n      words: [um, like]\n"
    chain = build_chain(parse_config(load_yaml(tmp_path / "relay.yaml", text=text), base_dir=tmp_path))
    assert chain.names == ["normalize", "strip_fillers"]
    bad = "stages:\n  - normalize\n  - strip_fillers:\n      wrods: [um]\n"
    with pytest.raises(ConfigError, match=r"relay.yaml:4 stages\[1\] \(strip_fillers\) -> wrods: unknown setting"):
        build_chain(parse_config(load_yaml(tmp_path / "relay.yaml", text=bad), base_dir=tmp_path))
