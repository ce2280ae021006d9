"""Stage `lm_rescore`: re-rank the N-best with an in-domain n-gram language model.

Per hypothesis: score = a * asr + b * lm + c * words - oov_penalty * oov_words, all natural-log
quantities, and the new posterior is the softmax of the scores over the list.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

from pydantic import BaseModel, ConfigDict, Field

from relay.errors import StageError
from relay.pipeline import Hypothesis, StageContext, Utterance, softmax

__all__ = [
    "LmRescoreSettings", "LmRescoreStage", "LmScore", "lm_per_word", "load_model", "score_tokens", "shared_model",
]

LN10 = math.log(10.0)
_POSTERIOR_FLOOR = 1e-300  # log(0) would poison the sum; the entry stays merely very unlikely


class LmRescoreSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")

    model: str = Field(description="ARPA or kenlm binary model; a relative path resolves against the config")
    asr_weight: float = Field(1.0, ge=0, description="a: weight of the recogniser's log posterior")
    lm_weight: float = Field(0.5, ge=0, description="b: weight of the LM natural-log probability")
    word_weight: float = Field(
        1.0, description="c: added per word; offsets the LM's preference for short hypotheses"
    )
    oov_penalty: float = Field(0.0, ge=0, description="subtracted per word the model does not know")


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


def load_model(path: Path) -> Any:
    """Open an ARPA or kenlm binary model with kenlm; StageError when it cannot."""
    import kenlm  # imported here so listing stages does not load the extension

    if not path.is_file():
        raise StageError("lm_rescore", f"model file {path} not found")
    config = kenlm.Config()
    config.show_progress = False  # kenlm otherwise draws a bar on stderr for every load and reload
    try:
        return kenlm.Model(str(path), config)
    except (OSError, RuntimeError, ValueError) as exc:
        raise StageError("lm_rescore", f"cannot load model {path}: {exc}") from None


_MODELS: dict[tuple[str, int, int], Any] = {}


def shared_model(path: Path) -> Any:
    """A kenlm model for ``path``, loaded once while the file stays the same.

    Keyed by (path, size, modification time): every stage naming the same file shares one copy,
    and a reload after the file changed opens the new one and drops the stale copy.
    """
    resolved = path.resolve()
    stat = resolved.stat() if resolved.is_file() else None
    key = (str(resolved), stat.st_size if stat else -1, stat.st_mtime_ns if stat else -1)
    model = _MODELS.get(key)
    if model is None:
        model = load_model(resolved)  # raises StageError naming the file when it cannot be read
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


def lm_per_word(hypothesis: Hypothesis) -> float | None:
    """The LM natural-log probability per word (``</s>`` included) of a rescored hypothesis."""
    if "lm_per_word" in hypothesis.scores:
        return hypothesis.scores["lm_per_word"]
    if "lm" in hypothesis.scores:
        return hypothesis.scores["lm"] / (len(hypothesis.tokens) + 1)
    return None


class LmRescoreStage:
    """Combine the recogniser's posterior with an in-domain LM and re-rank."""

    name: ClassVar[str] = "lm_rescore"
    Settings: ClassVar[type[BaseModel]] = LmRescoreSettings
    needs: ClassVar[frozenset[str]] = frozenset({"tokens", "posterior"})
    provides: ClassVar[frozenset[str]] = frozenset({"posterior", "lm_score"})

    def __init__(self, settings: LmRescoreSettings, *, context: StageContext) -> None:
        self.settings = settings
        self.model_path = context.resolve(Path(settings.model))
        self._model: Any = None

    def load(self) -> None:
        self._model = shared_model(self.model_path)

    def score(self, tokens: Sequence[str]) -> LmScore:
        if self._model is None:
            raise StageError(self.name, "process called before load")
        return score_tokens(self._model, tokens)

    def process(self, utterance: Utterance) -> Utterance:
        s = self.settings
        combined: list[float] = []
        lm_scores: list[float] = []
        oovs: list[int] = []
        for hypothesis in utterance.nbest:
            lm = self.score(hypothesis.tokens)
            asr = hypothesis.scores.get("asr")
            if asr is None:
                asr = math.log(max(hypothesis.posterior, _POSTERIOR_FLOOR))
            total = s.asr_weight * asr + s.lm_weight * lm.total + s.word_weight * lm.words - s.oov_penalty * lm.oov
            hypothesis.scores["lm"] = lm.total
            hypothesis.scores["lm_per_word"] = lm.per_word
            hypothesis.scores["lm_rescore"] = total
            combined.append(total)
            lm_scores.append(round(lm.total, 4))
            oovs.append(lm.oov)
        for hypothesis, posterior in zip(utterance.nbest, softmax(combined)):
            hypothesis.posterior = posterior
        utterance.note(lm=lm_scores, oov=oovs, combined=[round(c, 4) for c in combined])
        return utterance
