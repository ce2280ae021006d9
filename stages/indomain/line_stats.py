"""What the in-domain lines say about requests in general, for the gate to read a result against.

Two numbers a domain's own text gives, so that a confidence fitted on one trade's corpus means the
same in another:

- ``entity_free_share``: how often a request names no entity at all. A result whose nearest line
  has a slot it does not fill is either such a request ("is the kettle on" near "is the {machine}
  on") or a name said and not found. Which is likelier depends on the trade: 29 of the workshop's
  219 lines hold no slot and no literal name, 3 of the boatyard's 197, and of the results missing a
  slot, 67% were right on the workshop's Whisper corpus and 6% on the boatyard's. Smoothed by
  Laplace's rule of succession ((k + 1) / (n + 2)), so a text with no such line is not read as
  one where they never happen.
- ``unseen_share``: how much of new in-domain text the lines have never seen, by the Good-Turing
  estimate of the unseen mass (Good 1953): the share of word tokens whose word occurs once (N1 / N).
  The workshop's lines give 0.160, the boatyard's 0.226: a right boatyard request holds more words
  the in-domain LM has not seen, and a model fitted on the workshop read them as signs of error.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable, Sequence

from stages.indomain.text import is_marker

__all__ = ["entity_free_share", "unseen_share"]


def entity_free_share(lines: Iterable[Sequence[str]]) -> float | None:
    """The share of marked lines (literal names marked as slots) with no entity, by the rule of
    succession; None without lines."""
    counted = [any(is_marker(t) for t in line) for line in lines if line]
    if not counted:
        return None
    return (counted.count(False) + 1) / (len(counted) + 2)


def unseen_share(lines: Iterable[Sequence[str]]) -> float | None:
    """The Good-Turing probability that a word of new in-domain text is one the lines never hold:
    tokens of words that occur exactly once over all tokens, markers left out; None without words."""
    counts = Counter(t for line in lines for t in line if not is_marker(t))
    total = sum(counts.values())
    if not total:
        return None
    return sum(1 for c in counts.values() if c == 1) / total
