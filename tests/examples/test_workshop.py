from pathlib import Path

from relay.core.config import build_chain, load_config
from relay.workbench.build_lm import build_model
from relay.workbench.corpus import read_corpus
from tests.paths import WORKSHOP


def test_shipped_language_model_is_rebuilt_exactly(tmp_path: Path) -> None:
    # The committed ARPA must be what `rehear build-lm` makes from the committed text.
    rebuilt = tmp_path / "workshop.arpa"
    build_model(train=WORKSHOP / "train.txt", lexicon=WORKSHOP / "lexicon.csv", output=rebuilt, order=3)
    assert rebuilt.read_text() == (WORKSHOP / "workshop.arpa").read_text()


def test_example_configuration_loads_and_runs(tmp_path: Path) -> None:
    chain = build_chain(load_config(WORKSHOP / "relay.yaml"))
    chain.load()
    item = read_corpus(WORKSHOP / "corpus.jsonl")[0]
    utterance = chain.process(item.utterance())
    assert [entry.stage for entry in utterance.trace] == ["normalize", "lm_rescore", "lexicon", "gate"]
    assert utterance.decision in ("accept", "confirm", "reprompt")


def test_rescoring_and_lexicon_share_one_loaded_model() -> None:
    chain = build_chain(load_config(WORKSHOP / "relay.yaml"))
    chain.load()
    rescore, lexicon = chain.stages[1], chain.stages[2]
    assert rescore._model is lexicon.lm  # type: ignore[attr-defined]  # one copy of the LM in memory
