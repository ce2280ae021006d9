from typing import ClassVar

import pytest

from relay.core.errors import ConfigError
from relay.core.registry import Registry
from relay.core.utterance import Utterance
from stages.normalize.stage import NormalizeStage
from tests.plain_stage import PlainStage


def _stage(stage_name: str) -> type:
    class Custom(PlainStage):
        name: ClassVar[str] = stage_name

        def process(self, utterance: Utterance) -> Utterance:
            return utterance

    return Custom


def test_builtin_is_imported_on_demand() -> None:
    assert Registry().get("normalize") is NormalizeStage


def test_register_and_get() -> None:
    registry = Registry()
    cls = registry.register(_stage("shout"))
    assert registry.get("shout") is cls and "shout" in registry.names()


def test_taken_name_is_refused() -> None:
    with pytest.raises(ConfigError, match="taken by stages.normalize.stage.NormalizeStage"):
        Registry().register(_stage("normalize"))


def test_invalid_name_is_refused() -> None:
    with pytest.raises(ConfigError, match="invalid name"):
        Registry().register(_stage("Bad-Name"))


def test_unknown_name_lists_valid_ones() -> None:
    with pytest.raises(ConfigError) as caught:
        Registry(plugins=False).get("nope")
    assert "valid stages: gate, lexicon, lm_rescore, normalize" in str(caught.value)


def test_a_plugin_taking_a_builtin_name_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    from importlib.metadata import EntryPoint

    import relay.core.registry as registry_module

    clash = EntryPoint(name="lexicon", value="someone_else.stages:Lexicon", group="rehear.stages")
    fresh = EntryPoint(name="shout", value="someone_else.stages:Shout", group="rehear.stages")
    monkeypatch.setattr(registry_module, "entry_points", lambda group: [clash, fresh])
    with pytest.raises(ConfigError) as caught:
        Registry()
    assert "'lexicon' from someone_else.stages:Lexicon is already stages.lexicon.stage:LexiconStage" in str(caught.value)
