import jiwer
import pytest

from relay.workbench.alignment import align, aligned_span

PAIRS = [
    ("start the pump in zone three", "start the pumpkin shown three"),
    ("page siobhan virtanen", "she voted comment"),
    ("book the corvin bandsaw", "book the carving band saw for"),
    ("a b c", ""),
    ("", "x y"),
    ("lock the mezzanine", "lock the mezzanine"),
]


@pytest.mark.parametrize(("reference", "hypothesis"), PAIRS)
def test_alignment_cost_matches_jiwer(reference: str, hypothesis: str) -> None:
    ref, hyp = reference.split(), hypothesis.split()
    pairs = align(ref, hyp)
    # Every word appears exactly once, in order.
    assert [r for r, _ in pairs if r is not None] == list(range(len(ref)))
    assert [h for _, h in pairs if h is not None] == list(range(len(hyp)))
    edits = sum(1 for r, h in pairs if r is None or h is None or ref[r] != hyp[h])
    if ref and hyp:
        # jiwer (reference library) counts substitutions, deletions and insertions.
        out = jiwer.process_words(reference, hypothesis)
        assert edits == out.substitutions + out.deletions + out.insertions
    else:
        assert edits == max(len(ref), len(hyp))


def test_aligned_span_takes_split_words() -> None:
    ref = "book the corvin bandsaw for two".split()
    hyp = "book the carving band saw for two".split()
    assert aligned_span(align(ref, hyp), 2, 4) == (2, 5)  # "carving band saw"


def test_aligned_span_of_a_deleted_entity_is_none() -> None:
    ref = "call niamh now".split()
    hyp = "call now".split()
    assert aligned_span(align(ref, hyp), 1, 2) is None
