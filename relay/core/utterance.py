"""The Utterance a stage works on: the N-best list as hypotheses, and what stages find and decide.

Data flows one way: a validated recogniser message becomes an Utterance, each stage in the
configured order takes it and returns it changed, and the result is rendered as the cleaned
message. Stages are pure, synchronous CPU code; they never touch the network.
"""

from __future__ import annotations

import copyreg
import math
import operator
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, fields
from typing import Any, Literal

import orjson

from relay.core.errors import DeadlineExceeded, StageError

__all__ = ["SCORE_KEYS", "Correction", "Decision", "Entity", "Hypothesis", "TraceEntry", "Utterance", "score_key",
           "softmax"]

Decision = Literal["accept", "confirm", "reprompt"]

# Hypothesis.scores keys -> the capability of the stage that writes them. A stage names each
# key it writes once, as a module constant made by ``score_key``; readers import the constant.
SCORE_KEYS: dict[str, str] = {}


def score_key(key: str, capability: str) -> str:
    """Register ``key`` as a score written under ``capability``; returns ``key``.

    Two owners for one key would make a score mean two things; that is refused.
    """
    owner = SCORE_KEYS.setdefault(key, capability)
    if owner != capability:
        raise ValueError(f"score key {key!r} is already written under {owner!r}, not {capability!r}")
    return key


@dataclass(slots=True)
class Hypothesis:
    """One entry of the N-best list as the chain sees it."""

    text: str
    rank: int  # position in the recogniser's list (first occurrence, 0-based)
    fields: dict[str, Any]  # the recogniser's own fields, as received
    tokens: list[str] = field(default_factory=list)
    posterior: float = 0.0  # the relay's probability; sums to 1 over the list
    scores: dict[str, float] = field(default_factory=dict)  # natural-log scores by source
    merged: int = 1  # how many identical recogniser entries this one stands for
    # Other ways to read the same text ("7.30" as a time); a stage that scores text may choose
    # one and put it in ``tokens``. Empty when the text reads one way only.
    readings: list[list[str]] = field(default_factory=list)


@dataclass(slots=True)
class Entity:
    """A lexicon entry found in the chosen text."""

    id: str
    type: str
    name: str
    span: tuple[int, int]  # character offsets in Utterance.text
    heard: str  # the words the recogniser produced for it
    score: float
    # How the N-best backs it, for the gate (None where the finding stage does not say):
    support: float | None = None  # posterior share of hypotheses that hold it, by a strong sound match
    heard_exactly: float | None = None  # posterior share of hypotheses that hold its written form word for word
    margin: float | None = None  # its lead over the next entry for the same words
    overridden: float | None = None  # belief that the words a correction replaced were said as heard; 0: none replaced
    origin: str | None = None  # which way of finding entries placed it


@dataclass(slots=True)
class Correction:
    stage: str
    before: str
    after: str
    score: float
    reason: str


@dataclass(slots=True)
class TraceEntry:
    stage: str
    elapsed_us: float = 0.0
    scores: dict[str, Any] = field(default_factory=dict)


@dataclass(slots=True)
class Utterance:
    """The working object for one message."""

    id: str
    source: str
    speaker: str | None
    payload: dict[str, Any]  # the validated message as received, extra fields included
    nbest: list[Hypothesis]
    entities: list[Entity] = field(default_factory=list)
    corrections: list[Correction] = field(default_factory=list)
    trace: list[TraceEntry] = field(default_factory=list)
    decision: Decision | None = None
    prompt: str | None = None
    chosen_text: str | None = None  # set by a stage that rewrites the output text
    # time.monotonic() past which the work is wasted (the chain sets it); None: no deadline
    deadline: float | None = None

    @property
    def best(self) -> Hypothesis:
        """The hypothesis with the highest posterior; the recogniser's order breaks ties."""
        return min(self.nbest, key=lambda h: (-h.posterior, h.rank))

    @property
    def text(self) -> str:
        if self.chosen_text is not None:
            return self.chosen_text
        return self.best.text if self.nbest else ""

    @property
    def last_stage(self) -> str:
        """The stage of the last trace entry (the one running, or the last to run); "chain" before any."""
        return self.trace[-1].stage if self.trace else "chain"

    def ranked(self) -> list[Hypothesis]:
        return sorted(self.nbest, key=lambda h: (-h.posterior, h.rank))

    def note(self, **scores: Any) -> None:
        """Record key scores in the trace entry of the stage now running.

        The values must be what the cleaned message can carry (JSON: numbers, strings, lists,
        dicts; numpy numbers and arrays too). Anything else raises StageError here, naming the
        stage and the key, rather than later when the result is rendered and nobody knows who
        wrote it. orjson checks it in about a microsecond for a typical note.
        """
        if not self.trace:
            return
        try:
            orjson.dumps(scores, option=_TRACE_OPTIONS)
        except (TypeError, orjson.JSONEncodeError):
            stage = self.trace[-1].stage
            for key, value in scores.items():
                try:
                    orjson.dumps(value, option=_TRACE_OPTIONS)
                except (TypeError, orjson.JSONEncodeError) as exc:
                    raise StageError(stage, f"trace value {key!r} cannot be serialised "
                                            f"({type(value).__name__}: {exc})") from None
            raise StageError(stage, "trace values cannot be serialised") from None  # pragma: no cover
        self.trace[-1].scores.update(scores)

    def check_deadline(self) -> None:
        """Raise DeadlineExceeded once the deadline has passed; cheap (one clock read).

        Stages call it inside loops whose length grows with the message (per hypothesis, per
        span), so work on a message that is already too late stops there, not only between
        stages.
        """
        if self.deadline is not None and time.monotonic() > self.deadline:
            raise DeadlineExceeded(self.last_stage, 0.0, inside=True)


def _pickled_by_fields(cls: type) -> None:
    """Pickle (and copy) instances of the slots dataclass ``cls`` as ``cls(*field values)``.

    The process runner (relay.live.processes) pickles every utterance to a worker and back. A
    slots dataclass's own ``__getstate__``/``__setstate__`` look its fields up again for every
    object (ten hypotheses a message); this rebuilds the same values for about a third less on
    the way to a worker and an eighth less on the way back. A subclass, which may have fields of
    its own, pickles as before.
    """
    values = operator.attrgetter(*(f.name for f in fields(cls)))

    def __reduce__(self: Any) -> tuple[Callable[..., Any], tuple[Any, ...], Any]:
        if type(self) is not cls:
            # what object.__reduce_ex__ gives a slots dataclass
            return copyreg.__newobj__, (type(self),), self.__getstate__()  # type: ignore[attr-defined]
        return cls, values(self), None

    cls.__reduce__ = __reduce__  # type: ignore[assignment,method-assign]


for _class in (Hypothesis, Entity, Correction, TraceEntry, Utterance):
    _pickled_by_fields(_class)


# The options the relay renders the cleaned message with (relay.live.messages.dump): numpy
# numbers and arrays come from numeric stages.
_TRACE_OPTIONS = orjson.OPT_SERIALIZE_NUMPY


def softmax(log_scores: Sequence[float]) -> list[float]:
    """Probabilities from natural-log scores, computed stably."""
    if not log_scores:
        return []
    top = max(log_scores)
    if top == -math.inf:
        return [1.0 / len(log_scores)] * len(log_scores)
    weights = [math.exp(s - top) for s in log_scores]
    total = sum(weights)
    return [w / total for w in weights]
