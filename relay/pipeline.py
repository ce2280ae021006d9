"""The stage contract: the Utterance a stage works on, the Stage protocol, and the Chain.

Data flows one way: a validated recogniser message becomes an Utterance, each stage in the
configured order takes it and returns it changed, and the result is rendered as the cleaned
message. Stages are pure, synchronous CPU code; they never touch the network.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar, Literal, Protocol, runtime_checkable

from pydantic import BaseModel

from relay.errors import ConfigError, DeadlineExceeded

__all__ = [
    "CAPABILITIES",
    "Chain",
    "Correction",
    "Decision",
    "Entity",
    "Hypothesis",
    "Stage",
    "StageContext",
    "TraceEntry",
    "Utterance",
    "softmax",
]

Decision = Literal["accept", "confirm", "reprompt"]

# What a stage can read or produce. The message itself provides "text" only.
CAPABILITIES = frozenset({"text", "tokens", "posterior", "lm_score", "entities", "decision"})


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


@dataclass(slots=True)
class Entity:
    """A lexicon entry found in the chosen text."""

    id: str
    type: str
    name: str
    span: tuple[int, int]  # character offsets in Utterance.text
    heard: str  # the words the recogniser produced for it
    score: float


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

    @property
    def best(self) -> Hypothesis:
        """The hypothesis with the highest posterior; the recogniser's order breaks ties."""
        return min(self.nbest, key=lambda h: (-h.posterior, h.rank))

    @property
    def text(self) -> str:
        if self.chosen_text is not None:
            return self.chosen_text
        return self.best.text if self.nbest else ""

    def ranked(self) -> list[Hypothesis]:
        return sorted(self.nbest, key=lambda h: (-h.posterior, h.rank))

    def note(self, **scores: Any) -> None:
        """Record key scores in the trace entry of the stage now running."""
        if self.trace:
            self.trace[-1].scores.update(scores)


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


@dataclass(frozen=True, slots=True)
class StageContext:
    """What a stage may know about its surroundings at construction."""

    base_dir: Path  # relative paths in stage settings resolve against this
    cache_dir: Path  # where compiled resources may be cached
    progress: bool = False  # whether slow loads may draw a progress bar

    def resolve(self, path: Path) -> Path:
        """A path from stage settings: ``~`` expanded, relative ones taken from ``base_dir``."""
        path = path.expanduser()
        return path if path.is_absolute() else self.base_dir / path


@runtime_checkable
class Stage(Protocol):
    """A step of the chain.

    ``Settings`` is a pydantic model (extra keys forbidden) the YAML parameters validate
    against. ``load`` reads models and lexicons; it may be slow and runs again on reload.
    ``process`` is fast, pure and synchronous.
    """

    name: ClassVar[str]
    Settings: ClassVar[type[BaseModel]]
    needs: ClassVar[frozenset[str]]
    provides: ClassVar[frozenset[str]]

    def __init__(self, settings: Any, *, context: StageContext) -> None: ...

    def load(self) -> None: ...

    def process(self, utterance: Utterance) -> Utterance: ...


def check_order(stages: Iterable[Stage], *, location: Callable[[int], str] | None = None) -> None:
    """Raise ConfigError when a stage needs something no earlier stage provides."""
    available = {"text"}
    problems = []
    for index, stage in enumerate(stages):
        missing = sorted(stage.needs - available)
        if missing:
            where = location(index) if location else f"stages[{index}] ({stage.name})"
            problems.append(
                f"{where}: needs {', '.join(missing)}, which no earlier stage provides"
                f" (available: {', '.join(sorted(available))})"
            )
        available |= stage.provides
    if problems:
        raise ConfigError("The stage chain is out of order", problems)


class Chain:
    """Stages run in order; the same object serves the live relay and offline tools."""

    def __init__(self, stages: Sequence[Stage]) -> None:
        check_order(stages)
        self.stages = list(stages)

    @property
    def names(self) -> list[str]:
        return [stage.name for stage in self.stages]

    def load(self) -> None:
        for stage in self.stages:
            stage.load()

    def process(self, utterance: Utterance, *, deadline: float | None = None) -> Utterance:
        """Run every stage; ``deadline`` is a time.monotonic() value checked between stages."""
        start = time.monotonic()
        for stage in self.stages:
            if deadline is not None and time.monotonic() > deadline:
                raise DeadlineExceeded(stage.name, (time.monotonic() - start) * 1000)
            entry = TraceEntry(stage.name)
            utterance.trace.append(entry)
            began = time.perf_counter_ns()
            utterance = stage.process(utterance)
            entry.elapsed_us = (time.perf_counter_ns() - began) / 1000
        return utterance
