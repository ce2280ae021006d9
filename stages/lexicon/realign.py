"""Pooling that realigns the hypotheses: sightings for the strongest entries where the phone
index handed back none (step 6 of "Matching, step by step" in stages/lexicon/README.md)."""

from __future__ import annotations

from collections.abc import Sequence

from relay.core.utterance import Hypothesis
from stages.lexicon.compile import CompiledLexicon
from stages.lexicon.match import Evidence, Sighting, Spans, Weights, score_pairs
from stages.lexicon.rewrite import mapped_span, word_alignment
from stages.lexicon.sound.phonetics import CostModel

__all__ = ["realign"]

# A hypothesis this unlikely could add at most this much to a pooled score: not worth aligning.
_LEAST_POSTERIOR = 0.01


def realign(evidence: dict[int, Evidence], entries: Sequence[Evidence], spans: Spans, lexicon: CompiledLexicon,
            nbest: Sequence[Hypothesis], weights: Weights, costs: CostModel, *, slack: int) -> None:
    """Sightings for ``entries`` in the hypotheses that have none, and their pooled scores again.

    The phone index hands back a few forms per span, so an entry near in one hypothesis can be
    missing from another whose words there are only a little further off ("birthdays" beside
    "birth six"). Counted as 0, such a hypothesis with real posterior mass drowns the entry's
    exact match elsewhere. Here each hypothesis without a sighting has the words aligned with the
    entry's best sighting (a minimum-edit word alignment), and runs up to ``slack`` words longer or
    shorter at either end, scored against that sighting's form as ``score_spans`` scores pairs;
    the best that passes the pair floors becomes the hypothesis's sighting. Hypotheses under
    ``_LEAST_POSTERIOR`` are left as they are.
    """
    where: dict[tuple[int, int, int], int] = {}  # (hypothesis, start, end) -> span, built when first needed
    asks: list[tuple[Evidence, int, int, int, int, int]] = []  # (evidence, hypothesis, start, end, span, form)
    pairs: dict[tuple[int, int], None] = {}  # each distinct span/form pair asked, in order
    alignments: dict[tuple[int, int], tuple[tuple[str, int, int, int, int], ...]] = {}
    likely = [h for h, hypothesis in enumerate(nbest) if hypothesis.posterior >= _LEAST_POSTERIOR]
    runs = [(first, last) for first in range(-slack, slack + 1) for last in range(-slack, slack + 1)]
    for found in entries:
        held = found.per_hypothesis
        if not held or len(held) == len(nbest):
            continue
        origin = max(held, key=lambda h: nbest[h].posterior * held[h].score)
        seen = held[origin]
        for hypothesis in likely:
            if hypothesis in held:
                continue
            if not where:
                where = {(h, a, b): q for q, occurrences in enumerate(spans.occurrences) for h, a, b in occurrences}
            pair = (origin, hypothesis)
            if pair not in alignments:
                alignments[pair] = word_alignment(nbest[origin].tokens, nbest[hypothesis].tokens)
            start, end = mapped_span(alignments[pair], len(nbest[origin].tokens), len(nbest[hypothesis].tokens),
                                     seen.start, seen.end)
            for first, last in runs:
                q = where.get((hypothesis, start + first, end + last))
                if q is not None:
                    asks.append((found, hypothesis, start + first, end + last, q, seen.form))
                    pairs[(q, seen.form)] = None
    if not asks:
        return
    # Hypotheses share most of their words: each distinct span/form pair is scored once.
    scored = {(q, f): score for q, f, score, _ in score_pairs(spans, lexicon, [q for q, _ in pairs],
                                                                   [f for _, f in pairs], weights, costs)}
    changed: set[int] = set()
    for found, hypothesis, start, end, q, f in asks:
        score = scored.get((q, f))
        earlier = found.per_hypothesis.get(hypothesis)  # a run tried before for this hypothesis
        if score is not None and (earlier is None or score > earlier.score):
            found.per_hypothesis[hypothesis] = Sighting(score, start, end, f, False)
            changed.add(found.entry)
    for entry in changed:
        found = evidence[entry]
        found.pooled = float(sum([nbest[h].posterior * seen.score for h, seen in found.per_hypothesis.items()]))
