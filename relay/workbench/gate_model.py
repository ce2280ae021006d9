"""The gate's default confidence: the recipe that fits it on labelled corpora, and how well it holds
on a corpus it was not fitted on.

The recipe: run the default chain (built from each scenario's own files) over every labelled
corpus given, record the gate's features and whether each result's entities came out right,
and fit the logistic confidence on the features whose meaning does not depend on the domain
(shares, lead, in-domain fluency relative to the domain's own lines, the recogniser's own
confidence), each held to the direction it is known to push (``stages.gate.confidence.SIGNS``).
``scripts/fit_default_gate.py`` runs it on the shipped examples and writes the model the gate
uses when a configuration has none of its own.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from relay.workbench.corpus import read_corpus
from relay.workbench.defaults import folder_config, load_chain
from relay.workbench.evaluate import calibration_error, run_corpus
from relay.workbench.variants import with_overrides
from stages.gate.confidence import SIGNS, ConfidenceModel, confidence, fit_model

__all__ = ["TRANSFERABLE", "Row", "fit_default", "record", "transfer"]

# Features whose scale means the same in any domain and for any recogniser. The in-domain LM's
# absolute per-word scores are left out (their scale is the domain's: text_lm_relative carries
# the same information relative to the domain's own lines), and so is the edit share to the
# nearest line: a domain whose lines vary more puts right results further from them
# (line_edit_relative reads it against the lines' own share to one another). Likewise the raw
# counts of unknown words and of unfilled slots: a right request in a trade whose text is more
# varied holds more words the LM never saw (text_oov_relative), and an unfilled slot means a lost
# name more often where the lines nearly always name something (missing_slot_odds;
# stages.indomain.line_stats).
TRANSFERABLE: tuple[str, ...] = (
    "posterior", "margin", "weakest_entity", "entities", "corrections", "text_lm_relative", "text_lm_weakest",
    "text_oov_relative", "unfilled_slots", "line_edit_relative", "asr_log_conf", "weakest_support", "weakest_heard",
    "weakest_lead", "invented", "rewritten", "asr_word_mean", "missing_slot_odds",
    "most_overridden", "foreign_slots", "asr_no_conf",
)


@dataclass(frozen=True, slots=True)
class Row:
    """One recorded result: where it came from, its gate features, and whether it was right."""

    scenario: str
    corpus: str
    snr_db: Any
    values: dict[str, float | None]
    right: bool
    blocked: bool  # the safety rule or an empty result asks back whatever the confidence
    tags: dict[str, Any] = field(default_factory=dict)


def record(folders: Iterable[Path], corpora: Sequence[str], *, cache_dir: Path) -> list[Row]:
    """Rows for every utterance of each folder's corpora (those that exist), default chain."""
    rows: list[Row] = []
    for folder in folders:
        raw = with_overrides(folder_config(folder, cache_dir=cache_dir),
                             {"gate": {"confidence": None}})  # features do not depend on it
        chain = load_chain(raw, base_dir=folder)
        for name in corpora:
            if not (folder / name).exists():
                continue
            items = read_corpus(folder / name)
            for item, outcome in zip(items, run_corpus(chain, items)):
                gate = outcome.gate
                if gate is None:
                    continue
                rows.append(Row(folder.name, name, item.tags.get("snr_db"), gate.values(), outcome.entity_ok,
                                gate.safety_rule is not None or gate.empty, dict(item.tags)))
    return rows


def fit_default(rows: Sequence[Row]) -> ConfidenceModel:
    """The recipe's model fitted on ``rows``."""
    return fit_model([r.values for r in rows], [r.right for r in rows], signs=SIGNS, features=TRANSFERABLE)


def transfer(model: ConfidenceModel, rows: Sequence[Row], *, accept: float) -> dict[str, float]:
    """How the model does on ``rows``: AUC, calibration error, Brier score, and with ``accept`` as
    the threshold the share accepted, asked back from doubt, and wrong accepts (of accepted, of all)."""
    p = np.array([confidence(r.values, model) for r in rows])
    y = np.array([r.right for r in rows])
    blocked = np.array([r.blocked for r in rows])
    accepted = (p >= accept) & ~blocked
    order = np.argsort(p, kind="stable")
    ranks = np.empty(len(p))
    ranks[order] = np.arange(1, len(p) + 1)
    positives, negatives = int(y.sum()), int(len(y) - y.sum())
    auc = (ranks[y].sum() - positives * (positives + 1) / 2) / max(1, positives * negatives)
    return {
        "utterances": float(len(rows)), "right": float(y.mean()) if len(y) else math.nan, "auc": float(auc),
        "ece": calibration_error(p.tolist(), y.tolist()), "brier": float(np.mean((p - y) ** 2)),
        "accepted": float(accepted.mean()), "asked_doubt": float(((p < accept) & ~blocked).mean()),
        "asked_policy": float(blocked.mean()),
        "wrong_accepts": float((accepted & ~y).sum() / max(1, accepted.sum())),
        "wrong_accepts_of_all": float((accepted & ~y).mean()),
    }
