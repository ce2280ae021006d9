"""Entity recall and precision on the workshop corpus recorded from a real recogniser.

Source: examples/workshop/corpus.jsonl, recorded by synthesising each utterance and decoding
it with pocketsphinx's generic English model (see examples/workshop/README.md); the reference
entity ids were written with the utterance, before recognition. The bounds below leave room
for small changes but fail if the stage stops finding misheard names, starts inventing them,
or makes the text worse. WER comes from jiwer, an outside implementation.
"""

from __future__ import annotations

from pathlib import Path

import jiwer

from relay.core.chain import Chain
from relay.core.stage import StageContext
from relay.workbench.corpus import read_corpus
from relay.workbench.evaluate import run_corpus
from stages.lexicon.data import read_lexicon
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.stage import LexiconStage
from stages.normalize.stage import NormalizeSettings, NormalizeStage
from stages.normalize.tokens import tokenize
from tests.paths import WORKSHOP


def _exact_on_first(first: list[str], forms: dict[tuple[str, ...], str]) -> set[str]:
    """Entities whose name or alias stands word for word in the first hypothesis."""
    return {entity for form, entity in forms.items() for i in range(len(first))
            if tuple(first[i:i + len(form)]) == form}


def test_entity_recall_precision_and_wer_on_the_recorded_corpus(tmp_path: Path) -> None:
    context = StageContext(base_dir=WORKSHOP, cache_dir=tmp_path)
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LexiconStage(LexiconSettings(lexicon=Path("lexicon.csv"), speakers=Path("speakers.csv")),
                                context=context)])
    chain.load()
    items = read_corpus(WORKSHOP / "corpus.jsonl")
    outcomes = run_corpus(chain, items)
    forms = {tuple(tokenize(text)): entry.id for entry in read_lexicon(WORKSHOP / "lexicon.csv")
             for text in (entry.name, *entry.aliases)}
    truth = [item.entity_ids for item in items]
    ours = [set(o.found) for o in outcomes]
    exact = [_exact_on_first(tokenize(o.first), forms) for o in outcomes]

    def recall(found: list[set[str]]) -> float:
        return sum(len(f & t) for f, t in zip(found, truth)) / sum(len(t) for t in truth)

    def precision(found: list[set[str]]) -> float:
        return sum(len(f & t) for f, t in zip(found, truth)) / max(1, sum(len(f) for f in found))

    # Exact text matching on the first hypothesis finds about an eighth of the entities.
    assert recall(ours) >= 2.5 * recall(exact)
    assert recall(ours) >= 0.35
    assert precision(ours) >= 0.8
    # Corrections must make the text better, not worse.
    references = [" ".join(tokenize(o.reference)) or "-" for o in outcomes]
    first_wer = jiwer.wer(references, [" ".join(tokenize(o.first)) or "-" for o in outcomes])
    relay_wer = jiwer.wer(references, [o.text or "-" for o in outcomes])
    assert relay_wer < first_wer - 0.05
