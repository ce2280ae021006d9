"""Stage `lm_rescore`: re-rank the N-best with an in-domain n-gram language model.

Per hypothesis: score = a * asr + b * lm + c * words - oov_penalty * oov_words, all natural-log
quantities, and the new posterior is the softmax of the scores over the list.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any, ClassVar

from pydantic import BaseModel, ConfigDict, Field

from relay.core.errors import StageError
from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance, score_key, softmax
from stages.lm.model import LmScore, score_tokens, shared_model
from stages.normalize.stage import ASR_SCORE

__all__ = ["LM_COMBINED", "LM_PER_WORD", "LM_TOTAL", "LmRescoreSettings", "LmRescoreStage", "lm_per_word"]
# What this stage writes into Hypothesis.scores (natural logs), read by the gate.
LM_TOTAL = score_key("lm", "lm_score")  # the LM's log-probability of <s> tokens </s>
LM_PER_WORD = score_key("lm_per_word", "lm_score")  # the same per word, </s> counted
LM_COMBINED = score_key("lm_rescore", "lm_score")  # a*asr + b*lm + c*words - oov penalty
_POSTERIOR_FLOOR = 1e-300  # log(0) would poison the sum; the entry stays merely very unlikely


class LmRescoreSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")

    model: Path | None = Field(None, description="ARPA or kenlm binary model; default: domain.language_model")
    asr_weight: float = Field(1.0, ge=0, description="a: weight of the recogniser's log posterior")
    lm_weight: float = Field(0.5, ge=0, description="b: weight of the LM natural-log probability")
    word_weight: float = Field(
        1.0, description="c: added per word; offsets the LM's preference for short hypotheses"
    )
    oov_penalty: float = Field(0.0, ge=0, description="subtracted per word the model does not know")


def lm_per_word(hypothesis: Hypothesis) -> float | None:
    """The LM natural-log probability per word (``</s>`` included) of a rescored hypothesis."""
    if LM_PER_WORD in hypothesis.scores:
        return hypothesis.scores[LM_PER_WORD]
    if LM_TOTAL in hypothesis.scores:
        return hypothesis.scores[LM_TOTAL] / (len(hypothesis.tokens) + 1)
    return None


class LmRescoreStage:
    """Combine the recogniser's posterior with an in-domain LM and re-rank."""

    name: ClassVar[str] = "lm_rescore"
    Settings: ClassVar[type[BaseModel]] = LmRescoreSettings
    needs: ClassVar[frozenset[str]] = frozenset({"tokens", "posterior"})
    provides: ClassVar[frozenset[str]] = frozenset({"posterior", "lm_score", "tokens"})  # tokens: a number's reading

    def __init__(self, settings: LmRescoreSettings, *, context: StageContext) -> None:
        self.settings = settings
        self.model_path = context.require_file("language_model", settings.model, stage=self.name, setting="model")
        self.files = {"language model": self.model_path}
        self._model: Any = None

    def load(self) -> None:
        self._model = shared_model(self.model_path, stage=self.name)

    def score(self, tokens: Sequence[str]) -> LmScore:
        if self._model is None:
            raise StageError(self.name, "process called before load")
        return score_tokens(self._model, tokens)

    def process(self, utterance: Utterance) -> Utterance:
        s = self.settings
        combined: list[float] = []
        lm_scores: list[float] = []
        oovs: list[int] = []
        chosen = 0
        for hypothesis in utterance.nbest:
            utterance.check_deadline()
            lm = self.score(hypothesis.tokens)
            own = hypothesis.tokens
            for other in hypothesis.readings:
                # The reading the in-domain text makes likeliest ("seven thirty" or "seven point three zero").
                if other == hypothesis.tokens:
                    continue  # the readings start with the tokens themselves, scored just above
                scored = self.score(other)
                if scored.total > lm.total:
                    lm, hypothesis.tokens, hypothesis.text = scored, other, " ".join(other)
            chosen += hypothesis.tokens != own  # hypotheses whose reading changed, not swaps
            asr = hypothesis.scores.get(ASR_SCORE)
            if asr is None:
                asr = math.log(max(hypothesis.posterior, _POSTERIOR_FLOOR))
            total = s.asr_weight * asr + s.lm_weight * lm.total + s.word_weight * lm.words - s.oov_penalty * lm.oov
            hypothesis.scores[LM_TOTAL] = lm.total
            hypothesis.scores[LM_PER_WORD] = lm.per_word
            hypothesis.scores[LM_COMBINED] = total
            combined.append(total)
            lm_scores.append(round(lm.total, 4))
            oovs.append(lm.oov)
        for hypothesis, posterior in zip(utterance.nbest, softmax(combined)):
            hypothesis.posterior = posterior
        utterance.note(lm=lm_scores, oov=oovs, combined=[round(c, 4) for c in combined],
                       **({"readings_changed": chosen} if chosen else {}))
        return utterance
