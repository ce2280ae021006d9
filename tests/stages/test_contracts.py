"""Every built-in stage reads and writes only what it declares, and traces only JSON.

The workshop chain runs stage by stage under ``relay.core.testing.run_checked`` over recorded
recogniser messages (examples/workshop/corpus.jsonl), so each stage meets real N-best lists:
corrections, merged duplicates, empty hypotheses, safety words.
"""

from __future__ import annotations

from pathlib import Path
from typing import ClassVar

import pytest

from relay.core.chain import Chain
from relay.core.config import build_chain, load_config
from relay.core.errors import ConfigError
from relay.core.stage import StageContext
from relay.core.testing import make_utterance, run_checked
from relay.core.utterance import Utterance
from relay.workbench.corpus import read_corpus
from tests.paths import WORKSHOP
from tests.plain_stage import NoSettings, PlainStage


@pytest.fixture(scope="module")
def workshop_chain(tmp_path_factory: pytest.TempPathFactory) -> Chain:
    loaded = load_config(WORKSHOP / "relay.yaml")
    chain = build_chain(loaded)
    cache = tmp_path_factory.mktemp("cache")
    for stage in chain.stages:
        if hasattr(stage, "context"):
            stage.context = StageContext(base_dir=WORKSHOP, cache_dir=cache, domain=loaded.domain)
    chain.load()
    return chain


def test_builtin_stages_keep_their_declared_contract(workshop_chain: Chain) -> None:
    items = read_corpus(WORKSHOP / "corpus.jsonl")[::9]  # 50 utterances across voices and noise
    assert len(items) >= 50
    for item in items:
        utterance = item.utterance()
        for stage in workshop_chain.stages:
            utterance = run_checked(stage, utterance)
        assert utterance.decision is not None


class _Sneaky(PlainStage):
    """Declares nothing but reads the posterior, writes entities and traces a set."""

    name: ClassVar[str] = "sneaky"
    needs: ClassVar[frozenset[str]] = frozenset({"text"})

    def process(self, utterance: Utterance) -> Utterance:
        utterance.entities = [] if utterance.nbest[0].posterior > 2 else utterance.entities[:0]
        utterance.chosen_text = utterance.text.upper()
        utterance.note(seen={"a"})
        return utterance


def test_run_checked_names_every_broken_promise(tmp_path: Path) -> None:
    stage = _Sneaky(NoSettings(), context=StageContext(base_dir=tmp_path, cache_dir=tmp_path))
    with pytest.raises(AssertionError) as caught:
        run_checked(stage, make_utterance(["book the lathe", "look the lathe"]))
    message = str(caught.value)
    assert "sneaky reads 'posterior'" in message
    assert "sneaky writes 'corrections'" in message  # the rewritten text
    assert "trace of sneaky: 'seen' is not JSON" in message


def test_a_misspelt_capability_is_refused_when_the_chain_is_built(tmp_path: Path) -> None:
    class Typo(_Sneaky):
        provides: ClassVar[frozenset[str]] = frozenset({"entitites"})

    with pytest.raises(ConfigError) as caught:
        Chain([Typo(NoSettings(), context=StageContext(base_dir=tmp_path, cache_dir=tmp_path))])
    assert "provides 'entitites' is not a capability (valid: corrections, decision, entities" in str(caught.value)
