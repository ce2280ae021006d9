"""The in-domain language model's view of a candidate correction (a noisy-channel context term).

The lexicon stage judges a span by how it sounds; the language model says whether the sentence
reads like the domain once the span is rewritten. The term is the LM gain: natural-log
probability of the rewritten top hypothesis minus that of the hypothesis as heard, clipped to
[-cap, cap] so one out-of-vocabulary word cannot decide alone. The model was estimated with
`{type}` slots expanded from the lexicon, so "page {person}" contexts favour person names.

The model comes from `stages.lm.model.shared_model`, so `lm_rescore` and `lexicon` in one
process hold a single copy.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from stages.lm.model import score_tokens, shared_model

__all__ = ["ContextScorer", "shared_model"]


class ContextScorer:
    """LM gain of rewriting a word range of one token sequence, with per-sequence caching."""

    def __init__(self, model: Any, tokens: Sequence[str], *, cap: float) -> None:
        self.model = model
        self.tokens = list(tokens)
        self.cap = cap
        self.heard = score_tokens(model, self.tokens).total

    def gain(self, start: int, end: int, words: Sequence[str]) -> float:
        """ln P(rewritten) - ln P(heard), clipped to [-cap, cap]."""
        rewritten = self.tokens[:start] + list(words) + self.tokens[end:]
        if rewritten == self.tokens:
            return 0.0
        change = score_tokens(self.model, rewritten).total - self.heard
        return max(-self.cap, min(self.cap, change))
