"""Offline evaluation: run a labelled corpus through the same Chain the relay runs, then score it.

Running and scoring are separate: ``run_corpus`` records one ``Outcome`` per utterance (what
the chain produced, the gate's features, timings), and ``summarize`` turns any subset of
outcomes into the numbers. `tune` relies on that split to score held-out folds only.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

from rapidfuzz.distance import Levenshtein
from tqdm import tqdm

from relay.core.chain import Chain
from relay.core.stage import deciding_stage
from relay.core.utterance import Decision
from relay.workbench.corpus import CorpusItem
from stages.gate.features import GateFeatures
from stages.normalize.tokens import tokenize

__all__ = ["Outcome", "Summary", "calibration_error", "confidence_quality", "edit_distance", "result_line",
           "run_corpus", "summarize", "word_errors"]

DECISIONS: tuple[Decision, ...] = ("accept", "confirm", "reprompt")


def edit_distance(reference: Sequence[str], hypothesis: Sequence[str]) -> int:
    """Levenshtein distance over words: substitutions, deletions and insertions cost 1."""
    return int(Levenshtein.distance(list(reference), list(hypothesis)))


def word_errors(reference: str, hypothesis: str) -> tuple[int, int]:
    """(edits, reference words) after the shared tokeniser normalises both sides."""
    ref = tokenize(reference)
    return edit_distance(ref, tokenize(hypothesis)), len(ref)


@dataclass(slots=True)
class Outcome:
    """What the chain made of one corpus utterance."""

    id: str
    tags: dict[str, Any]
    ref_words: int
    errors_first: int
    errors_oracle: int
    errors_relay: int
    reference_ids: frozenset[str]
    found: dict[str, str]  # entity id -> type, as the chain reported them
    decision: Decision | None
    gate: GateFeatures | None
    stage_us: dict[str, float]
    total_us: float
    text: str = ""
    reference: str = ""
    first: str = ""
    top: str = ""  # the hypothesis the chain chose, before the lexicon rewrote any of its words
    confidence: float | None = None  # the gate's confidence that the entities are right, when it has one
    rule: str | None = None  # the gate's rule behind the decision
    corrections: list[tuple[str, str]] = field(default_factory=list)
    nbest: list[tuple[str, float]] = field(default_factory=list)  # the final N-best: text, posterior, best first

    @property
    def entity_ok(self) -> bool:
        return frozenset(self.found) == self.reference_ids

    @property
    def slot_errors(self) -> int:
        """Substitutions, deletions and insertions of entities, as the slot error rate counts them
        (Makhoul, Kubala, Schwartz and Weischedel 1999): within a type, a wrong entity found where
        one was missed is one substitution, a miss left over a deletion, a wrong one an insertion."""
        missed = Counter(i.partition(".")[0] for i in self.reference_ids - self.found.keys())
        wrong = Counter(t for i, t in self.found.items() if i not in self.reference_ids)
        return sum(max(missed[t], wrong[t]) for t in missed.keys() | wrong.keys())


def _gate_of(chain: Chain) -> Any:
    """The stage that decides (provides "decision"), when it can say why (has ``features``)."""
    stage = deciding_stage(chain.stages)
    return stage if callable(getattr(stage, "features", None)) else None


def _traced(utterance: Any, stage: Any, key: str) -> Any:
    """A value the deciding stage wrote into its trace entry, or None."""
    if stage is None:
        return None
    entry = next((t for t in reversed(utterance.trace) if t.stage == stage.name), None)
    return None if entry is None else entry.scores.get(key)


def run_corpus(chain: Chain, items: Iterable[CorpusItem], *, progress: bool = False,
               description: str = "evaluating") -> list[Outcome]:
    """Process every item with ``chain`` and record its outcome; the chain must be loaded."""
    items = list(items)
    gate = _gate_of(chain)
    outcomes = []
    bar = tqdm(items, desc=description, unit="utt", disable=not progress or len(items) < 50, leave=False)
    for item in bar:
        utterance = item.utterance()
        first = utterance.nbest[0].text
        oracle = min(word_errors(item.reference, h.text)[0] for h in utterance.nbest)
        utterance = chain.process(utterance)
        errors_first, ref_words = word_errors(item.reference, first)
        stage_us: dict[str, float] = {}
        for entry in utterance.trace:
            stage_us[entry.stage] = stage_us.get(entry.stage, 0.0) + entry.elapsed_us
        outcomes.append(Outcome(
            id=item.id,
            tags=item.tags,
            ref_words=ref_words,
            errors_first=errors_first,
            errors_oracle=oracle,
            errors_relay=word_errors(item.reference, utterance.text)[0],
            reference_ids=item.entity_ids,
            found={e.id: e.type for e in utterance.entities},
            decision=utterance.decision,
            gate=gate.features(utterance) if gate is not None else None,
            stage_us=stage_us,
            total_us=sum(stage_us.values()),
            text=utterance.text,
            reference=item.reference,
            first=first,
            top=" ".join(utterance.best.tokens) if utterance.nbest else "",
            confidence=_traced(utterance, gate, "confidence"),
            rule=_traced(utterance, gate, "rule"),
            corrections=[(c.before, c.after) for c in utterance.corrections],
            nbest=[(h.text, h.posterior) for h in sorted(utterance.nbest, key=lambda h: -h.posterior)],
        ))
    return outcomes


def result_line(outcome: Outcome) -> dict[str, Any]:
    """One utterance as `rehear eval --results` writes it."""
    return {"id": outcome.id, "reference": outcome.reference, "first": outcome.first, "text": outcome.text,
            "found": sorted(outcome.found), "expected": sorted(outcome.reference_ids), "decision": outcome.decision,
            "rule": outcome.rule, "confidence": outcome.confidence, "right": outcome.entity_ok,
            "tags": outcome.tags}


def percentile(values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile (q in [0, 100]); 0.0 for no values."""
    if not values:
        return 0.0
    ordered = sorted(values)
    rank = max(1, math.ceil(q / 100 * len(ordered)))
    return ordered[rank - 1]


def _ratio(part: float, whole: float) -> float:
    return part / whole if whole else 0.0


@dataclass(slots=True)
class Summary:
    """The evaluation's numbers for a set of outcomes."""

    utterances: int
    wer_first: float
    wer_oracle: float
    wer_relay: float
    entity_recall: float
    entity_precision: float
    decisions: dict[str, float]
    wrong_accept_rate: float
    accepted_with_word_error: float
    accepted: int
    wrong_accepts: int
    asked_policy: float  # share asked back by the safety rule, whatever the scores
    asked_doubt: float  # share asked back because the gate doubted the result
    quality: dict[str, float]  # of the gate's confidence, where it has one: nce, ece, brier
    latency_us: dict[str, float]
    stage_latency_us: dict[str, dict[str, float]]

    @property
    def clarify_rate(self) -> float:
        return self.decisions["confirm"] + self.decisions["reprompt"]

    def to_json(self) -> dict[str, Any]:
        """Exactly the keys `rehear eval --json` promises."""
        return {
            "utterances": self.utterances,
            "wer_first": self.wer_first,
            "wer_oracle": self.wer_oracle,
            "wer_relay": self.wer_relay,
            "entity_recall": self.entity_recall,
            "entity_precision": self.entity_precision,
            "decisions": dict(self.decisions),
            "wrong_accept_rate": self.wrong_accept_rate,
            "accepted": self.accepted,
            "wrong_accepts": self.wrong_accepts,
            "asked_policy": self.asked_policy,
            "asked_doubt": self.asked_doubt,
            "confidence_quality": dict(self.quality),
            "latency_us": dict(self.latency_us),
        }


def summarize(outcomes: Sequence[Outcome], *, decisions: Sequence[Decision | None] | None = None) -> Summary:
    """Score outcomes. ``decisions`` overrides the recorded ones (a gate sweep re-decides on
    recorded features). No gate in the chain means every result goes through: accept."""
    chosen = [d or "accept" for d in (decisions if decisions is not None else [o.decision for o in outcomes])]
    words = sum(o.ref_words for o in outcomes)
    hits = sum(len(o.reference_ids & o.found.keys()) for o in outcomes)
    accepted = [o for o, d in zip(outcomes, chosen) if d == "accept"]
    stages: dict[str, list[float]] = {}
    for outcome in outcomes:
        for stage, elapsed in outcome.stage_us.items():
            stages.setdefault(stage, []).append(elapsed)
    totals = [o.total_us for o in outcomes]
    asked = [d in ("confirm", "reprompt") for d in chosen]
    policy = [a and o.gate is not None and o.gate.safety_rule is not None for o, a in zip(outcomes, asked)]
    scored = [(o.confidence, o.entity_ok) for o in outcomes if o.confidence is not None]
    return Summary(
        utterances=len(outcomes),
        wer_first=_ratio(sum(o.errors_first for o in outcomes), words),
        wer_oracle=_ratio(sum(o.errors_oracle for o in outcomes), words),
        wer_relay=_ratio(sum(o.errors_relay for o in outcomes), words),
        entity_recall=_ratio(hits, sum(len(o.reference_ids) for o in outcomes)),
        entity_precision=_ratio(hits, sum(len(o.found) for o in outcomes)),
        decisions={d: _ratio(chosen.count(d), len(chosen)) for d in DECISIONS},
        wrong_accept_rate=_ratio(sum(not o.entity_ok for o in accepted), len(accepted)),
        accepted_with_word_error=_ratio(sum(o.errors_relay > 0 for o in accepted), len(accepted)),
        accepted=len(accepted),
        wrong_accepts=sum(not o.entity_ok for o in accepted),
        asked_policy=_ratio(sum(policy), len(chosen)),
        asked_doubt=_ratio(sum(asked) - sum(policy), len(chosen)),
        quality=confidence_quality([p for p, _ in scored], [r for _, r in scored]) if scored else {},
        latency_us={"p50": percentile(totals, 50), "p99": percentile(totals, 99)},
        stage_latency_us={s: {"p50": percentile(v, 50), "p99": percentile(v, 99)} for s, v in stages.items()},
    )


def calibration_error(probabilities: Sequence[float], right: Sequence[bool], *, bins: int = 10) -> float:
    """Expected calibration error: over equal-width confidence bins, the gap between the mean
    confidence and the rate of right results, weighted by the bin's share."""
    total = 0.0
    for number in range(bins):
        low, high = number / bins, (number + 1) / bins
        inside = [(p, r) for p, r in zip(probabilities, right) if low <= p < high or (number == bins - 1 and p == 1.0)]
        if inside:
            mean = sum(p for p, _ in inside) / len(inside)
            rate = sum(r for _, r in inside) / len(inside)
            total += len(inside) / len(probabilities) * abs(mean - rate)
    return total


def confidence_quality(probabilities: Sequence[float], right: Sequence[bool]) -> dict[str, float]:
    """How good a confidence is: normalised cross entropy (NCE, as NIST's scoring tools report
    for recogniser word confidences: 1 - H(truth | confidence) / H(truth), 1 perfect, 0 no
    better than the base rate, below 0 worse), expected calibration error and Brier score."""
    count = len(probabilities)
    share = sum(right) / count
    clipped = [min(1 - 1e-6, max(1e-6, p)) for p in probabilities]
    prior = -(share * math.log2(share) + (1 - share) * math.log2(1 - share)) * count if 0 < share < 1 else 0.0
    given = -sum(math.log2(p) if r else math.log2(1 - p) for p, r in zip(clipped, right))
    return {"nce": (prior - given) / prior if prior else 0.0,
            "ece": calibration_error(probabilities, right),
            "brier": sum((p - r) ** 2 for p, r in zip(probabilities, right)) / count}


def format_table(summary: Summary, *, title: str = "") -> str:
    """The summary as an aligned plain-text table."""
    rows = [
        ("utterances", f"{summary.utterances}"),
        ("WER, first hypothesis", f"{summary.wer_first:.1%}"),
        ("WER, best in list (oracle)", f"{summary.wer_oracle:.1%}"),
        ("WER, rehear", f"{summary.wer_relay:.1%}"),
        ("  change against first", f"{_ratio(summary.wer_relay - summary.wer_first, summary.wer_first):+.1%}"),
        ("entity recall", f"{summary.entity_recall:.1%}"),
        ("entity precision", f"{summary.entity_precision:.1%}"),
    ]
    rows += [(f"decision {d}", f"{summary.decisions[d]:.1%}") for d in DECISIONS]
    rows += [
        ("asked back (confirm + reprompt)", f"{summary.clarify_rate:.1%}"),
        ("  by the safety rule (policy)", f"{summary.asked_policy:.1%}"),
        ("  from doubt", f"{summary.asked_doubt:.1%}"),
        ("wrong accepts (entity ids differ)", f"{summary.wrong_accept_rate:.1%} ({summary.wrong_accepts} of "
                                              f"{summary.accepted} accepted)"),
        ("accepted with a word error", f"{summary.accepted_with_word_error:.1%}"),
    ]
    if summary.quality:
        q = summary.quality
        rows.append(("confidence NCE / ECE / Brier", f"{q['nce']:.3f} / {q['ece']:.3f} / {q['brier']:.3f}"))
    for stage, values in summary.stage_latency_us.items():
        rows.append((f"latency {stage} p50 / p99", f"{values['p50']:.0f} / {values['p99']:.0f} us"))
    rows.append(("latency total p50 / p99", f"{summary.latency_us['p50']:.0f} / {summary.latency_us['p99']:.0f} us"))
    width = max(len(name) for name, _ in rows)
    lines = [title] if title else []
    lines += [f"{name.ljust(width)}  {value}" for name, value in rows]
    return "\n".join(lines)
