"""The report's tables: the summary in percent, and the results to read one by one (each wrong
accept, each result asked back that was right), with what was heard, what was sent, the
N-best, the decision, the rule and the confidence behind it."""

from __future__ import annotations

import html
from collections.abc import Sequence

from relay.workbench.evaluate import DECISIONS, Outcome, Summary

__all__ = ["result_lists", "summary_table"]

_LISTED = 200  # rows per list; a corpus with more is summarised by the plots, not read line by line
_NBEST = 5


def _null(value: object) -> str:
    return "<span class='null'>null</span>" if value is None else html.escape(str(value))


def _percent(share: float) -> str:
    return f"{share:.1%}"


def summary_table(summary: Summary) -> str:
    """The evaluation's numbers; every share in percent of what it says."""
    change = (summary.wer_relay - summary.wer_first) / summary.wer_first if summary.wer_first else 0.0
    rows = [
        ("utterances", str(summary.utterances)),
        ("WER, recogniser's first hypothesis", _percent(summary.wer_first)),
        ("WER, best hypothesis in the list (oracle)", _percent(summary.wer_oracle)),
        ("WER, rehear", f"{_percent(summary.wer_relay)} ({change:+.1%} against the first hypothesis)"),
        ("entity recall / precision", f"{_percent(summary.entity_recall)} / {_percent(summary.entity_precision)}"),
    ]
    rows += [(f"decision {d}, % of utterances", _percent(summary.decisions[d])) for d in DECISIONS]
    rows += [
        ("asked back (confirm + reprompt), % of utterances", _percent(summary.clarify_rate)),
        ("&nbsp;&nbsp;by the safety rule (policy)", _percent(summary.asked_policy)),
        ("&nbsp;&nbsp;from the gate's doubt", _percent(summary.asked_doubt)),
        ("wrong accepts, % of accepted (entity ids differ)",
         f"{_percent(summary.wrong_accept_rate)} ({summary.wrong_accepts} of {summary.accepted})"),
        ("accepted with a word error, % of accepted", _percent(summary.accepted_with_word_error)),
    ]
    if summary.quality:
        q = summary.quality
        rows.append(("confidence: calibration error (ECE), percentage points", f"{q['ece'] * 100:.1f}"))
        rows.append(("confidence: NCE (1 perfect, 0 no better than the base rate) / Brier score",
                     f"{q['nce']:.3f} / {q['brier']:.3f}"))
    for stage, values in summary.stage_latency_us.items():
        rows.append((f"latency {html.escape(stage)} p50 / p99, ms", f"{values['p50'] / 1000:.2f} / {values['p99'] / 1000:.2f}"))
    rows.append(("latency total p50 / p99, ms",
                 f"{summary.latency_us['p50'] / 1000:.2f} / {summary.latency_us['p99'] / 1000:.2f}"))
    body = "".join(f"<tr><th>{name}</th><td class='num'>{value}</td></tr>" for name, value in rows)
    return f"<table>{body}</table>"


def _nbest(outcome: Outcome) -> str:
    items = "".join(f"<li>{html.escape(text)} <span class='null'>({posterior:.0%})</span></li>"
                    for text, posterior in outcome.nbest[:_NBEST])
    more = f"<li>... {len(outcome.nbest) - _NBEST} more</li>" if len(outcome.nbest) > _NBEST else ""
    return f"<ol class='nbest'>{items}{more}</ol>" if items else _null(None)


def _entities(ids: frozenset[str] | set[str]) -> str:
    """One id a line: ids do not break inside, and the column stays narrow."""
    return "<br>".join(html.escape(i) for i in sorted(ids)) or "<span class='null'>none</span>"


def _table(outcomes: Sequence[Outcome]) -> str:
    head = ("id", "said", "heard (first hypothesis)", "sent", "N-best (posterior)", "entities expected",
            "entities found", "decision, rule, confidence")
    rows = []
    for o in outcomes[:_LISTED]:
        confidence = _null(None) if o.confidence is None else f"{o.confidence:.0%}"
        cells = [f"<td class='id'>{html.escape(o.id)}</td>", f"<td>{html.escape(o.reference)}</td>",
                 f"<td>{html.escape(o.first)}</td>", f"<td>{html.escape(o.text)}</td>", f"<td>{_nbest(o)}</td>",
                 f"<td class='id'>{_entities(o.reference_ids)}</td>", f"<td class='id'>{_entities(set(o.found))}</td>",
                 f"<td class='nowrap'>{_null(o.decision)}<br>{_null(o.rule)}<br>{confidence}</td>"]
        rows.append("<tr>" + "".join(cells) + "</tr>")
    more = f"<p>{len(outcomes) - _LISTED} more not listed.</p>" if len(outcomes) > _LISTED else ""
    return ("<table class='results'><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>" + "".join(rows)
            + "</table>" + more)


def result_lists(outcomes: Sequence[Outcome]) -> str:
    """Each wrong accept, and each result asked back whose entities were right."""
    wrong = [o for o in outcomes if o.decision in (None, "accept") and not o.entity_ok]
    needless = [o for o in outcomes if o.decision in ("confirm", "reprompt") and o.entity_ok]
    parts = [f"<h2>Wrong accepts ({len(wrong)})</h2>",
             "<p>Accepted, but the entities sent on are not the ones said.</p>",
             _table(wrong) if wrong else "<p>None.</p>",
             f"<h2>Asked back, but right ({len(needless)})</h2>",
             "<p>The entities sent on were the ones said, yet the gate asked back: the rule says whether "
             "the safety rule did it (policy) or the confidence was too low (doubt).</p>",
             _table(needless) if needless else "<p>None.</p>"]
    return "\n".join(parts)
