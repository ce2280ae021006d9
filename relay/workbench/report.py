"""The HTML evaluation report: the numbers, and plots embedded as base64 PNG so the file stands alone.

Plots: wrong-accept rate against the share asked back as the gate's thresholds move (swept on
the recorded gate features, no re-run), entity recall per entity type, and the most frequent
corrections and misses.
"""

from __future__ import annotations

import base64
import html
import io
import itertools
from collections import Counter
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from relay.workbench.evaluate import Outcome, Summary, format_table, summarize
from relay.workbench.tuning import (
    DEFAULT_GATE_GRID,
    RecordedFeatures,
    confidence_accepts,
    gate_accepts,
    rates,
)
from stages.gate.confidence import ConfidenceModel, confidence

__all__ = ["entity_type", "tradeoff_curve", "write_report"]

_TOP = 15
_STYLE = "<style>body{font-family:sans-serif;max-width:60em;margin:2em auto}td,th{padding:2px 8px}</style>"


def tradeoff_curve(outcomes: Sequence[Outcome], confidence_model: ConfidenceModel | None = None) -> list[tuple[float, float]]:
    """(share asked back, wrong-accept rate) on the lower envelope of the gate's settings: its
    threshold grid and, when the gate has a learned confidence, that confidence's threshold."""
    features = RecordedFeatures(outcomes)
    grid = np.array(list(itertools.product(*DEFAULT_GATE_GRID.values())), dtype=float)
    accept = gate_accepts(features, grid, None)
    if confidence_model is not None:
        sure = np.array([confidence(v, confidence_model) for v in features.values])
        accept = np.vstack([accept, confidence_accepts(features, sure, np.unique(np.r_[sure, 0.0]))])
    accepted, clarify, wrong = rates(accept, features.ok)
    envelope: list[tuple[float, float]] = []
    best = np.inf
    for index in np.argsort(clarify, kind="stable"):
        if accepted[index] and wrong[index] < best:  # with nothing accepted the rate means nothing
            best = float(wrong[index])
            envelope.append((float(clarify[index]), best))
    return envelope


def entity_type(entity_id: str, known: dict[str, str]) -> str:
    """The type the chain reported for an id; else the id's prefix before a dot (``machine.x``)."""
    if entity_id in known:
        return known[entity_id]
    return entity_id.split(".", 1)[0] if "." in entity_id else "unknown"


def _recall_by_type(outcomes: Sequence[Outcome]) -> dict[str, tuple[int, int]]:
    known = {i: t for o in outcomes for i, t in o.found.items()}
    counts: dict[str, list[int]] = {}
    for outcome in outcomes:
        for entity_id in outcome.reference_ids:
            tally = counts.setdefault(entity_type(entity_id, known), [0, 0])
            tally[0] += entity_id in outcome.found
            tally[1] += 1
    return {t: (hit, total) for t, (hit, total) in sorted(counts.items())}


def _png(figure: Any) -> str:
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _plots(outcomes: Sequence[Outcome], summary: Summary,
           confidence_model: ConfidenceModel | None) -> list[tuple[str, str]]:
    import matplotlib

    matplotlib.use("Agg")  # no display on servers and CI
    from matplotlib import pyplot as plt

    images = []
    if all(o.gate is not None for o in outcomes):
        curve = tradeoff_curve(outcomes, confidence_model)
        figure, axes = plt.subplots(figsize=(6, 4))
        axes.step([c for c, _ in curve], [w for _, w in curve], where="post", label="best thresholds for each share")
        axes.scatter([summary.clarify_rate], [summary.wrong_accept_rate], color="red", zorder=3, label="this run")
        axes.set_xlabel("share asked back (confirm + reprompt)")
        axes.set_ylabel("wrong-accept rate")
        axes.legend()
        axes.grid(alpha=0.3)
        images.append(("Wrong accepts against clarifications as the gate moves", _png(figure)))
        plt.close(figure)
    recall = _recall_by_type(outcomes)
    if recall:
        figure, axes = plt.subplots(figsize=(6, 3.5))
        names = list(recall)
        axes.bar(names, [hit / total for hit, total in recall.values()])
        for x, (hit, total) in enumerate(recall.values()):
            axes.annotate(f"{hit}/{total}", (x, hit / total), ha="center", va="bottom", fontsize=8)
        axes.set_ylim(0, 1.1)
        axes.set_ylabel("recall")
        images.append(("Entity recall per type", _png(figure)))
        plt.close(figure)
    for title, counter in (("Most frequent corrections", _fixes(outcomes)), ("Most frequent misses", _misses(outcomes))):
        if counter:
            top = counter.most_common(_TOP)[::-1]
            figure, axes = plt.subplots(figsize=(7, 0.3 * len(top) + 1))
            axes.barh([label for label, _ in top], [count for _, count in top])
            axes.set_xlabel("utterances")
            images.append((title, _png(figure)))
            plt.close(figure)
    return images


_MAX_GROUPS = 8  # a tag with more distinct values than this is an id, not a condition


def by_tag(outcomes: Sequence[Outcome]) -> list[tuple[str, str, Summary]]:
    """(tag, value, summary) for every tag of the corpus with a few distinct values: where it fails."""
    values: dict[str, Counter[str]] = {}
    for outcome in outcomes:
        for tag, value in outcome.tags.items():
            values.setdefault(tag, Counter())[str(value)] += 1
    rows = []
    for tag in sorted(values):
        seen = values[tag]
        if not 1 < len(seen) <= _MAX_GROUPS or max(seen.values()) == 1:  # one group, or one per utterance
            continue
        for value in sorted(seen):
            group = [o for o in outcomes if str(o.tags.get(tag)) == value]
            rows.append((tag, value, summarize(group)))
    return rows


def _tag_table(outcomes: Sequence[Outcome]) -> str:
    rows = by_tag(outcomes)
    if not rows:
        return ""
    head = ("tag", "value", "utterances", "WER first", "WER rehear", "entity recall", "asked back", "wrong accepts")
    out = ["<h2>By corpus tag</h2><table><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>"]
    for tag, value, s in rows:
        cells = [tag, value, str(s.utterances), f"{s.wer_first:.1%}", f"{s.wer_relay:.1%}", f"{s.entity_recall:.1%}",
                 f"{s.clarify_rate:.1%}", f"{s.wrong_accept_rate:.1%}"]
        out.append("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>")
    out.append("</table>")
    return "".join(out)


def _fixes(outcomes: Sequence[Outcome]) -> Counter[str]:
    return Counter(f"{before} -> {after}" for o in outcomes for before, after in o.corrections)


def _misses(outcomes: Sequence[Outcome]) -> Counter[str]:
    return Counter(entity_id for o in outcomes for entity_id in o.reference_ids - o.found.keys())


def write_report(path: Path, outcomes: Sequence[Outcome], summary: Summary, *, title: str,
                 confidence_model: ConfidenceModel | None = None) -> None:
    """Write a self-contained HTML report."""
    parts = [f"<!doctype html><meta charset='utf-8'><title>{html.escape(title)}</title>",
             _STYLE,
             f"<h1>{html.escape(title)}</h1>", f"<pre>{html.escape(format_table(summary))}</pre>"]
    for caption, image in _plots(outcomes, summary, confidence_model):
        parts.append(f"<h2>{html.escape(caption)}</h2><img alt='{html.escape(caption)}' "
                     f"src='data:image/png;base64,{image}'>")
    parts.append(_tag_table(outcomes))
    wrong = [o for o in outcomes if o.decision in (None, "accept") and not o.entity_ok][:30]
    if wrong:
        parts.append("<h2>Wrong accepts (first 30)</h2><table><tr><th>id</th><th>reference</th><th>result</th>"
                     "<th>missing</th><th>extra</th></tr>")
        for o in wrong:
            cells = [o.id, o.reference, o.text, ", ".join(sorted(o.reference_ids - o.found.keys())),
                     ", ".join(sorted(o.found.keys() - o.reference_ids))]
            parts.append("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>")
        parts.append("</table>")
    path.write_text("\n".join(parts) + "\n", encoding="utf-8")
