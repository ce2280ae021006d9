"""The in-domain language model's view of a candidate correction (a noisy-channel context term).

The lexicon stage judges a span by how it sounds; the language model says whether the sentence
reads like the domain once the span is rewritten. The term is the LM gain: natural-log
probability of the rewritten best hypothesis minus that of the hypothesis as heard, clipped to
[-cap, cap] so one out-of-vocabulary word cannot decide alone. The model was estimated with
`{type}` slots expanded from the lexicon, so "page {person}" contexts favour person names.

Models are opened once per (path, size, modification time) and shared by every stage that asks,
so `lm_rescore` and `lexicon` in one process hold a single copy.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

from stages.lm_rescore import load_model, score_tokens

__all__ = ["ContextScorer", "shared_model"]

_MODELS: dict[tuple[str, int, int], Any] = {}


def shared_model(path: Path) -> Any:
    """A kenlm model for ``path``, loaded once while the file stays the same."""
    resolved = path.resolve()
    stat = resolved.stat() if resolved.is_file() else None
    key = (str(resolved), stat.st_size if stat else -1, stat.st_mtime_ns if stat else -1)
    model = _MODELS.get(key)
    if model is None:
        model = load_model(resolved)  # raises StageError naming the file when it cannot be read
        for old in [k for k in _MODELS if k[0] == key[0]]:
            del _MODELS[old]  # the file changed: drop the stale copy
        _MODELS[key] = model
    return model


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
