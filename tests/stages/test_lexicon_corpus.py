"""Entity recall and precision on the workshop corpus recorded from a real recogniser.

Source: examples/workshop/corpus.jsonl, recorded by synthesising each utterance and decoding
it with pocketsphinx's generic English model (see examples/workshop/record_corpus.py); the
reference entity ids were written with the utterance, before recognition. The bounds below
leave room for small changes but fail if the stage stops finding misheard names, starts
inventing them, or makes the text worse.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
FOLDER = ROOT / "examples" / "workshop"


def test_entity_recall_precision_and_wer_on_the_recorded_corpus(tmp_path: Path) -> None:
    sys.path.insert(0, str(ROOT))
    from benchmarks.eval_lexicon import build_chain, evaluate

    ours, exact = evaluate(FOLDER, build_chain(FOLDER, tmp_path))
    # Exact text matching on the first hypothesis finds about an eighth of the entities.
    assert ours.recall >= 2.5 * exact.recall
    assert ours.recall >= 0.35
    assert ours.precision >= 0.8
    # Corrections must make the text better, not worse (jiwer WER against the reference).
    assert ours.out_wer < ours.first_wer - 0.05
