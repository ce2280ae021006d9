"""The HTML evaluation report: what was run on what, the numbers, plots embedded as base64 PNG
so the file stands alone, and the results a person should read one by one.

Shares are shown in percent everywhere (tables and plot axes); a missing value is written
``null``, as the CLI's JSON writes it. Plots: wrong-accept rate against the share asked back as
the gate's thresholds move (swept on the recorded gate features, no re-run), the reliability
of the gate's confidence, entity recall per entity type, the most frequent corrections and misses.
"""

from __future__ import annotations

import base64
import datetime
import html
import io
import itertools
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from relay import __version__
from relay.workbench.corpus import tag_text
from relay.workbench.evaluate import Outcome, Summary, summarize
from relay.workbench.report_tables import result_lists, summary_table
from relay.workbench.tuning import (
    DEFAULT_GATE_GRID,
    RecordedFeatures,
    confidence_accepts,
    gate_accepts,
    rates,
)
from relay.workbench.written import write_atomically
from stages.gate.confidence import ConfidenceModel, confidence

__all__ = ["ReportHeader", "by_tag", "entity_type", "reliability", "render_report", "tradeoff_curve", "write_report"]

_TOP = 15
_BINS = 10
_STYLE = """<style>
body{font-family:system-ui,sans-serif;margin:1.5em 2em;color:#222}
h1{margin-bottom:.2em}
table{border-collapse:collapse;margin:.5em 0 1.5em}
td,th{padding:3px 10px;text-align:left;vertical-align:top;border-bottom:1px solid #e4e4e4}
th{background:#f4f4f4}
td.num{text-align:right;font-variant-numeric:tabular-nums}
.id,.nowrap{white-space:nowrap}
table.about th{background:none;font-weight:600;border:none}
table.about td{border:none}
img{display:block;width:100%;height:auto;max-width:100%}
ol.nbest{margin:0;padding-left:1.4em;font-size:90%;min-width:16em}
table.results{font-size:92%}
.null{color:#888}
</style>"""


@dataclass(frozen=True, slots=True)
class ReportHeader:
    """What the report was made from: configuration, rehear version, date and corpus."""

    configuration: str
    corpus: str
    selection: str = "all lines"
    config_hash: str = ""
    chain: tuple[str, ...] = ()
    version: str = __version__
    created: str = field(default_factory=lambda: datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%d %H:%M UTC"))

    def rows(self, utterances: int) -> list[tuple[str, str]]:
        configuration = self.configuration + (f" (hash {self.config_hash})" if self.config_hash else "")
        return [("configuration", configuration), ("chain", " -> ".join(self.chain) or "null"),
                ("corpus", f"{self.corpus}: {utterances} utterances ({self.selection})"),
                ("rehear", self.version), ("date", self.created)]


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


def reliability(outcomes: Sequence[Outcome], *, bins: int = _BINS) -> list[tuple[float, float, float, int]]:
    """Per equal-width confidence bin holding results: (bin start, mean confidence, share right,
    count). A calibrated confidence puts the share right on the mean confidence."""
    rows = []
    scored = [(o.confidence, o.entity_ok) for o in outcomes if o.confidence is not None]
    for number in range(bins):
        low, high = number / bins, (number + 1) / bins
        inside = [(p, r) for p, r in scored if low <= p < high or (number == bins - 1 and p == 1.0)]
        if inside:
            rows.append((low, sum(p for p, _ in inside) / len(inside), sum(r for _, r in inside) / len(inside),
                         len(inside)))
    return rows


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
    figure.savefig(buffer, format="png", dpi=100, bbox_inches="tight")
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _plots(outcomes: Sequence[Outcome], summary: Summary,
           confidence_model: ConfidenceModel | None) -> list[tuple[str, str]]:
    import matplotlib

    matplotlib.use("Agg")  # no display on servers and CI
    from matplotlib import pyplot as plt
    from matplotlib.ticker import PercentFormatter

    percent = PercentFormatter(1.0, decimals=0)
    images = []
    if all(o.gate is not None for o in outcomes):
        curve = tradeoff_curve(outcomes, confidence_model)
        figure, axes = plt.subplots(figsize=(12, 4.5))
        axes.step([c for c, _ in curve], [w for _, w in curve], where="post", label="best thresholds for each share")
        axes.scatter([summary.clarify_rate], [summary.wrong_accept_rate], color="red", zorder=3, label="this run")
        axes.set_xlabel("asked back (confirm + reprompt), % of utterances")
        axes.set_ylabel("wrong accepts, % of accepted")
        axes.xaxis.set_major_formatter(percent)
        axes.yaxis.set_major_formatter(percent)
        axes.legend()
        axes.grid(alpha=0.3)
        images.append(("Wrong accepts against clarifications as the gate moves", _png(figure)))
        plt.close(figure)
    bins = reliability(outcomes)
    if bins:
        figure, axes = plt.subplots(figsize=(12, 4.5))
        axes.plot([0, 1], [0, 1], color="grey", linestyle="--", label="calibrated")
        axes.bar([low for low, *_ in bins], [right for _, _, right, _ in bins], width=1 / _BINS, align="edge",
                 alpha=0.5, edgecolor="black", label="share right in the bin")
        axes.plot([mean for _, mean, _, _ in bins], [right for _, _, right, _ in bins], marker="o", color="C1",
                  label="at the bin's mean confidence")
        for low, _mean, right, count in bins:
            axes.annotate(str(count), (low + 0.5 / _BINS, right), ha="center", va="bottom", fontsize=8)
        axes.set_xlim(0, 1)
        axes.set_ylim(0, 1.08)
        axes.set_xlabel("the gate's confidence that the entities are right, %")
        axes.set_ylabel("results with the right entities, %")
        axes.xaxis.set_major_formatter(percent)
        axes.yaxis.set_major_formatter(percent)
        axes.legend(loc="upper left")
        axes.grid(alpha=0.3)
        images.append(("Reliability of the gate's confidence (numbers: results per bin)", _png(figure)))
        plt.close(figure)
    recall = _recall_by_type(outcomes)
    if recall:
        figure, axes = plt.subplots(figsize=(12, 3.8))
        names = list(recall)
        axes.bar(names, [hit / total for hit, total in recall.values()])
        for x, (hit, total) in enumerate(recall.values()):
            axes.annotate(f"{hit}/{total}", (x, hit / total), ha="center", va="bottom", fontsize=8)
        axes.set_ylim(0, 1.1)
        axes.set_ylabel("entity recall, %")
        axes.yaxis.set_major_formatter(percent)
        images.append(("Entity recall per type", _png(figure)))
        plt.close(figure)
    for title, counter in (("Most frequent corrections", _fixes(outcomes)), ("Most frequent misses", _misses(outcomes))):
        if counter:
            top = counter.most_common(_TOP)[::-1]
            figure, axes = plt.subplots(figsize=(12, 0.3 * len(top) + 1))
            axes.barh([label for label, _ in top], [count for _, count in top])
            axes.set_xlabel("utterances")
            images.append((title, _png(figure)))
            plt.close(figure)
    return images


_MAX_GROUPS = 8  # a tag with more distinct values than this is an id, not a condition


def by_tag(outcomes: Sequence[Outcome]) -> list[tuple[str, str, Summary]]:
    """(tag, value as the CLI's filters write it, summary) for every tag of the corpus with a few
    distinct values: where it fails. A missing tag is ``null``."""
    values: dict[str, Counter[str]] = {}
    for outcome in outcomes:
        for tag, value in outcome.tags.items():
            values.setdefault(tag, Counter())[tag_text(value)] += 1
    rows = []
    for tag in sorted(values):
        seen = values[tag]
        if not 1 < len(seen) <= _MAX_GROUPS or max(seen.values()) == 1:  # one group, or one per utterance
            continue
        for value in sorted(seen):
            group = [o for o in outcomes if tag_text(o.tags.get(tag)) == value]
            rows.append((tag, value, summarize(group)))
    return rows


def _tag_table(outcomes: Sequence[Outcome]) -> str:
    rows = by_tag(outcomes)
    if not rows:
        return ""
    head = ("tag", "value", "utterances", "WER first", "WER rehear", "entity recall", "asked back", "wrong accepts")
    out = ["<h2>By corpus tag</h2><table><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>"]
    for tag, value, s in rows:
        cells = [f"<td class='nowrap'>{html.escape(tag)}</td>", f"<td class='nowrap'>{html.escape(value)}</td>"]
        cells += [f"<td class='num'>{c}</td>" for c in (str(s.utterances), f"{s.wer_first:.1%}", f"{s.wer_relay:.1%}",
                                                        f"{s.entity_recall:.1%}", f"{s.clarify_rate:.1%}",
                                                        f"{s.wrong_accept_rate:.1%}")]
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table>")
    return "".join(out)


def _fixes(outcomes: Sequence[Outcome]) -> Counter[str]:
    return Counter(f"{before} -> {after}" for o in outcomes for before, after in o.corrections)


def _misses(outcomes: Sequence[Outcome]) -> Counter[str]:
    return Counter(entity_id for o in outcomes for entity_id in o.reference_ids - o.found.keys())


def render_report(outcomes: Sequence[Outcome], summary: Summary, *, about: ReportHeader,
                  confidence_model: ConfidenceModel | None = None) -> str:
    """The report as one self-contained HTML page."""
    title = f"rehear evaluation: {Path(about.corpus).name}"
    parts = [f"<!doctype html><html lang='en'><meta charset='utf-8'><title>{html.escape(title)}</title>", _STYLE,
             f"<h1>{html.escape(title)}</h1><table class='about'>"]
    parts += [f"<tr><th>{html.escape(k)}</th><td>{html.escape(v)}</td></tr>" for k, v in about.rows(len(outcomes))]
    parts.append("</table><h2>Summary</h2>" + summary_table(summary))
    for caption, image in _plots(outcomes, summary, confidence_model):
        parts.append(f"<h2>{html.escape(caption)}</h2><img alt='{html.escape(caption)}' "
                     f"src='data:image/png;base64,{image}'>")
    parts.append(_tag_table(outcomes))
    parts.append(result_lists(outcomes))
    return "\n".join(parts) + "\n"


def write_report(path: Path, outcomes: Sequence[Outcome], summary: Summary, *, about: ReportHeader,
                 confidence_model: ConfidenceModel | None = None) -> None:
    """Write the self-contained HTML report (atomically, with the process umask)."""
    page = render_report(outcomes, summary, about=about, confidence_model=confidence_model)
    write_atomically(path, page.encode("utf-8"))
