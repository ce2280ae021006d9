"""The in-domain language model as the stages query it: kenlm loaded once per file, sentences scored."""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from relay.core.errors import StageError

__all__ = ["LmScore", "load_model", "score_tokens", "shared_model"]

LN10 = math.log(10.0)
_log = logging.getLogger("rehear.lm")


def _is_arpa(path: Path) -> bool:
    """ARPA text starts with a blank line or ``\\data\\``; kenlm's binary form with its own magic."""
    try:
        with path.open("rb") as handle:
            start = handle.read(64)
    except OSError:
        return False
    return start.lstrip().startswith(b"\\data\\")


@dataclass(frozen=True, slots=True)
class LmScore:
    """A token sequence's LM score in natural log, with ``</s>`` counted as a word."""

    total: float
    words: int  # tokens scored, not counting </s>
    oov: int
    weakest: float  # natural log of the least likely word (of </s> when there is no word)

    @property
    def per_word(self) -> float:
        return self.total / (self.words + 1)


def load_model(path: Path, *, stage: str = "lm_rescore") -> Any:
    """Open an ARPA or kenlm binary model with kenlm; StageError naming ``stage`` when it cannot."""
    import kenlm  # imported here so listing stages does not load the extension

    if not path.is_file():
        raise StageError(stage, f"model file {path} not found")
    config = kenlm.Config()
    config.show_progress = False  # kenlm otherwise draws a bar on stderr for every load and reload
    # kenlm writes its "faster if you build a binary file" notice straight to stderr, past the
    # log format; the same advice goes to the log instead.
    config.arpa_complain = kenlm.ARPALoadComplain.NONE
    if _is_arpa(path):
        _log.info("loading an ARPA language model; its binary form loads faster (rehear build-lm --binary)",
                  extra={"fields": {"model": str(path)}})
    try:
        return kenlm.Model(str(path), config)
    except (OSError, RuntimeError, ValueError) as exc:
        raise StageError(stage, f"cannot load model {path}: {exc}") from None


_MODELS: dict[tuple[str, int, int], Any] = {}


def shared_model(path: Path, *, stage: str = "lm_rescore") -> Any:
    """A kenlm model for ``path``, loaded once while the file stays the same.

    Keyed by (path, size, modification time): every stage naming the same file shares one copy,
    and a reload after the file changed opens the new one and drops the stale copy.
    """
    resolved = path.resolve()
    stat = resolved.stat() if resolved.is_file() else None
    key = (str(resolved), stat.st_size if stat else -1, stat.st_mtime_ns if stat else -1)
    model = _MODELS.get(key)
    if model is None:
        model = load_model(resolved, stage=stage)  # StageError naming the stage and the file
        for old in [k for k in _MODELS if k[0] == key[0]]:
            del _MODELS[old]
        _MODELS[key] = model
    return model


def score_tokens(model: Any, tokens: Sequence[str]) -> LmScore:
    """Natural-log probability of ``<s> tokens </s>`` under a kenlm model."""
    sentence = " ".join(tokens)
    total = 0.0
    oov = 0
    count = len(tokens)
    weakest = math.inf
    for position, (log10_prob, _length, is_oov) in enumerate(model.full_scores(sentence, bos=True, eos=True)):
        total += log10_prob
        oov += int(is_oov)
        if (position < count or count == 0) and log10_prob < weakest:
            weakest = log10_prob
    return LmScore(total * LN10, count, oov, weakest * LN10)
