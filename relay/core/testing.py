"""A test kit for stage authors: build an Utterance in one line, and run a stage under watch.

``run_checked`` runs a stage's ``process`` on an utterance whose hypotheses record what is
read, compares what changed, and fails (AssertionError, with one line per problem) when the
stage reads a capability it does not declare in ``needs``, ``uses`` or ``provides``, writes one
it does not ``provide``, uses a score key no stage registered (``relay.core.utterance.score_key``)
or leaves a trace value that JSON cannot carry. Use it in your stage's tests::

    from relay.core.testing import make_utterance, run_checked

    def test_shout_keeps_its_contract():
        stage = ShoutStage(ShoutSettings(), context=test_context(tmp_path))
        stage.load()
        result = run_checked(stage, make_utterance(["book the lathe", "look the lathe"]))
        assert result.text == "BOOK THE LATHE"
"""

from __future__ import annotations

import json
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from relay.core.domain import Domain
from relay.core.stage import GIVEN, Stage, StageContext, declared
from relay.core.utterance import SCORE_KEYS, Entity, Hypothesis, TraceEntry, Utterance

__all__ = ["make_utterance", "run_checked", "test_context", "trace_problems"]


def test_context(base_dir: Path, *, domain: Domain | None = None) -> StageContext:
    """A StageContext for tests: files resolve against ``base_dir``, caches go beneath it."""
    return StageContext(base_dir=base_dir, cache_dir=base_dir / ".rehear-cache", domain=domain or Domain())


test_context.__test__ = False  # type: ignore[attr-defined]  # a helper, not a test to collect


def make_utterance(texts: Sequence[str], posteriors: Sequence[float] | None = None, *, id: str = "u-1",
                   source: str = "test", speaker: str | None = None, entities: Sequence[Entity] = (),
                   fields: Sequence[dict[str, Any]] | None = None) -> Utterance:
    """An utterance as `normalize` leaves it: hypotheses in order, tokens split on spaces (lower
    case), posteriors as given (default: falling by rank, summing to 1)."""
    if posteriors is None:
        weights = [0.5 ** rank for rank in range(len(texts))]
        posteriors = [w / sum(weights) for w in weights]
    if len(posteriors) != len(texts):
        raise ValueError(f"{len(texts)} texts but {len(posteriors)} posteriors")
    given = list(fields) if fields is not None else [{"text": text} for text in texts]
    nbest = [Hypothesis(text=text, rank=rank, fields=dict(given[rank]), tokens=text.lower().split(),
                        posterior=posterior)
             for rank, (text, posterior) in enumerate(zip(texts, posteriors))]
    payload = {"id": id, "source": source, "nbest": given} | ({"speaker": speaker} if speaker else {})
    return Utterance(id=id, source=source, speaker=speaker, payload=payload, nbest=nbest, entities=list(entities))


# Which capability each attribute stands for.
_HYPOTHESIS_READS = {"text": "text", "rank": "message", "fields": "message", "merged": "message",
                     "tokens": "tokens", "posterior": "posterior"}
_UTTERANCE_READS = {"payload": "message", "speaker": "message", "entities": "entities",
                    "corrections": "corrections", "decision": "decision", "prompt": "decision",
                    "chosen_text": "corrections", "text": "text", "best": "posterior", "ranked": "posterior"}


class _Watch:
    def __init__(self) -> None:
        self.reads: set[str] = set()
        self.unknown_keys: set[str] = set()
        self.quiet = 0

    def read(self, capability: str) -> None:
        if not self.quiet:
            self.reads.add(capability)

    def key(self, key: object) -> None:
        if self.quiet:
            return
        owner = SCORE_KEYS.get(str(key))
        if owner is None:
            self.unknown_keys.add(str(key))
        else:
            self.reads.add(owner)

    @contextmanager
    def silent(self) -> Iterator[None]:
        self.quiet += 1
        try:
            yield
        finally:
            self.quiet -= 1


class _Scores(dict[str, float]):
    """Hypothesis.scores that records which keys are read."""

    watch: _Watch

    def __getitem__(self, key: str) -> float:
        self.watch.key(key)
        return super().__getitem__(key)

    def get(self, key: str, default: Any = None) -> Any:
        self.watch.key(key)
        return super().get(key, default)

    def __contains__(self, key: object) -> bool:
        self.watch.key(key)
        return super().__contains__(key)


class _WatchedHypothesis(Hypothesis):
    __slots__ = ("_watch",)

    def __getattribute__(self, name: str) -> Any:
        capability = _HYPOTHESIS_READS.get(name)
        if capability is not None:
            object.__getattribute__(self, "_watch").read(capability)
        return object.__getattribute__(self, name)


class _WatchedUtterance(Utterance):
    __slots__ = ("_watch",)

    def __getattribute__(self, name: str) -> Any:
        capability = _UTTERANCE_READS.get(name)
        if capability is None:
            return object.__getattribute__(self, name)
        watch: _Watch = object.__getattribute__(self, "_watch")
        watch.read(capability)
        with watch.silent():  # what a property reads inside is the property's business
            return object.__getattribute__(self, name)

    def note(self, **scores: Any) -> None:
        # Recorded unchecked, so run_checked reports a bad trace value beside every other broken
        # promise; Utterance.note itself raises StageError at the first one.
        if self.trace:
            self.trace[-1].scores.update(scores)


def _watched(utterance: Utterance, watch: _Watch) -> Utterance:
    nbest: list[Hypothesis] = []
    for h in utterance.nbest:
        scores = _Scores(h.scores)
        scores.watch = watch
        copy = _WatchedHypothesis(h.text, h.rank, dict(h.fields), list(h.tokens), h.posterior, scores, h.merged)
        object.__setattr__(copy, "_watch", watch)
        nbest.append(copy)
    result = _WatchedUtterance(utterance.id, utterance.source, utterance.speaker, utterance.payload, nbest,
                               list(utterance.entities), list(utterance.corrections), list(utterance.trace),
                               utterance.decision, utterance.prompt, utterance.chosen_text)
    object.__setattr__(result, "_watch", watch)
    return result


def _state(utterance: Utterance) -> dict[str, Any]:
    """What a stage may change, by capability, with its watch silenced."""
    hypotheses = utterance.nbest
    return {
        "nbest": [(h.text, h.rank, h.merged) for h in hypotheses],
        "tokens": [tuple(h.tokens) for h in hypotheses],
        "posterior": [h.posterior for h in hypotheses],
        "scores": [dict(h.scores) for h in hypotheses],
        "entities": list(utterance.entities),
        "corrections": (list(utterance.corrections), utterance.chosen_text),
        "decision": (utterance.decision, utterance.prompt),
    }


def trace_problems(trace: Sequence[TraceEntry]) -> list[str]:
    """One line per trace value that strict JSON cannot carry (sets, NaN, objects, non-text keys)."""
    problems = []
    for entry in trace:
        for key, value in entry.scores.items():
            try:
                json.dumps({key: value}, allow_nan=False)
            except (TypeError, ValueError) as exc:
                problems.append(f"trace of {entry.stage}: {key!r} is not JSON ({exc})")
    return problems


def run_checked(stage: Stage, utterance: Utterance) -> Utterance:
    """``stage.process(utterance)`` with its declared contract checked; the processed result."""
    watch = _Watch()
    watched = _watched(utterance, watch)
    watched.trace.append(TraceEntry(stage.name))
    with watch.silent():
        before = _state(watched)
    result = stage.process(watched)
    with watch.silent():
        after = _state(result)
    declared_ = declared(stage)
    may_read = declared_["needs"] | declared_["uses"] | declared_["provides"] | GIVEN
    problems = [f"{stage.name} reads {c!r}, which it does not declare in needs, uses or provides"
                for c in sorted(watch.reads - may_read)]
    problems += [f"{stage.name} reads score key {k!r}, which no stage registered with score_key()"
                 for k in sorted(watch.unknown_keys)]
    written = {c for c in ("tokens", "posterior", "entities", "corrections", "decision") if before[c] != after[c]}
    if before["nbest"] != after["nbest"]:
        written.add("posterior")  # merging or dropping hypotheses moves probability
    for old, new in zip(before["scores"], after["scores"]):
        for key in set(new) - set(old) | {k for k in new if k in old and new[k] != old[k]}:
            owner = SCORE_KEYS.get(key)
            if owner is None:
                problems.append(f"{stage.name} writes score key {key!r}, which is not registered with score_key()")
            else:
                written.add(owner)
    problems += [f"{stage.name} writes {c!r}, which it does not declare in provides"
                 for c in sorted(written - declared_["provides"])]
    problems += trace_problems(result.trace)
    if problems:
        raise AssertionError("stage contract broken:\n" + "\n".join(f"  {p}" for p in problems))
    return result
