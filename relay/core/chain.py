"""The Chain: stages run in order; the same object serves the live relay and the offline tools."""

from __future__ import annotations

import time
from collections.abc import Sequence

from relay.core.errors import DeadlineExceeded, StageError
from relay.core.stage import Stage, check_order
from relay.core.utterance import TraceEntry, Utterance

__all__ = ["Chain"]


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
            try:
                stage.load()
            except StageError as exc:
                if exc.stage == stage.name:
                    raise
                # A helper shared between stages (the language model loader) names the stage it
                # was written for; the problem is this stage's, and so is the setting to fix.
                raise StageError(stage.name, exc.detail) from None

    def process(self, utterance: Utterance, *, deadline: float | None = None) -> Utterance:
        """Run every stage; ``deadline`` is a time.monotonic() value checked between stages and
        inside the stages that call ``Utterance.check_deadline``."""
        start = time.monotonic()
        utterance.deadline = deadline
        for stage in self.stages:
            if deadline is not None and time.monotonic() > deadline:
                raise DeadlineExceeded(stage.name, (time.monotonic() - start) * 1000)
            entry = TraceEntry(stage.name)
            utterance.trace.append(entry)
            began = time.perf_counter_ns()
            utterance = stage.process(utterance)
            entry.elapsed_us = (time.perf_counter_ns() - began) / 1000
        return utterance
