"""Stage `normalize`: one tokenisation for every hypothesis, duplicates merged, and the
initial posterior from the recogniser's scores."""

from __future__ import annotations

import math
from typing import ClassVar, Literal

from pydantic import BaseModel, ConfigDict, Field

from relay.core.stage import StageContext
from relay.core.utterance import Hypothesis, Utterance, score_key, softmax
from stages.normalize.tokens import readings

__all__ = ["ASR_SCORE", "NormalizeSettings", "NormalizeStage"]

# The recogniser's own score as a natural-log posterior, read by lm_rescore.
ASR_SCORE = score_key("asr", "posterior")
_CONF_FLOOR = 1e-6  # a confidence of 0 must not become -inf: the entry stays possible


class NormalizeSettings(BaseModel):
    model_config = ConfigDict(extra="forbid")

    # Recognisers' total log scores are acoustic-model sums, far too peaked to read as a
    # posterior; 0.05 is a conventional acoustic scale and suits the example recogniser
    # (sweep in relay/workbench/README.md). `rehear tune` fits it to yours.
    logprob_scale: float = Field(
        0.05, gt=0, description="multiplies the recogniser's natural-log score before the softmax"
    )
    rank_decay: float = Field(
        0.7, ge=0, description="log-probability lost per rank when the recogniser gives no score"
    )
    prefer: Literal["logprob", "conf", "rank"] = Field(
        "logprob", description="which recogniser score to trust first when several are present"
    )


class NormalizeStage:
    """Tokenise, merge identical hypotheses by summing probability, set the initial posterior."""

    name: ClassVar[str] = "normalize"
    Settings: ClassVar[type[BaseModel]] = NormalizeSettings
    needs: ClassVar[frozenset[str]] = frozenset({"text", "message"})
    provides: ClassVar[frozenset[str]] = frozenset({"tokens", "posterior"})

    def __init__(self, settings: NormalizeSettings, *, context: StageContext) -> None:
        self.settings = settings

    def load(self) -> None:
        pass

    def _initial_log_scores(self, nbest: list[Hypothesis]) -> tuple[str, list[float]]:
        order = {"logprob": ["logprob", "conf"], "conf": ["conf", "logprob"], "rank": []}
        for source in order[self.settings.prefer]:
            values = [h.fields.get(source) for h in nbest]
            if all(isinstance(v, (int, float)) for v in values):
                if source == "logprob":
                    return source, [self.settings.logprob_scale * float(v) for v in values]  # type: ignore[arg-type]
                return source, [math.log(max(float(v), _CONF_FLOOR)) for v in values]  # type: ignore[arg-type]
        return "rank", [-self.settings.rank_decay * h.rank for h in nbest]

    def process(self, utterance: Utterance) -> Utterance:
        nbest = utterance.nbest
        source, log_scores = self._initial_log_scores(nbest)
        probabilities = softmax(log_scores)
        merged: dict[tuple[str, ...], Hypothesis] = {}
        for hypothesis, probability in zip(nbest, probabilities):
            utterance.check_deadline()
            tokens, *others = readings(hypothesis.text)
            key = tuple(tokens)
            kept = merged.get(key)
            if kept is None:
                hypothesis.tokens = tokens
                hypothesis.readings = [tokens, *others] if others else []
                hypothesis.text = " ".join(tokens)
                hypothesis.posterior = probability
                merged[key] = hypothesis
            else:
                kept.posterior += probability
                kept.merged += hypothesis.merged
        utterance.nbest = list(merged.values())
        for hypothesis in utterance.nbest:
            hypothesis.scores[ASR_SCORE] = math.log(max(hypothesis.posterior, 1e-300))
        utterance.note(score_source=source, hypotheses=len(nbest), distinct=len(utterance.nbest))
        return utterance
