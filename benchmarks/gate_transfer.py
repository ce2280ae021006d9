"""The gate's default confidence fitted on one example scenario and judged on the other, both ways.

The recipe is the one that makes the shipped model (scripts/fit_default_gate.py): every corpus
of the fitting scenario (both recognisers, every noise part), the transferable features, each
held to its known direction. Reported on the other scenario, for Whisper's clean + 20-25 dB part
and for the speech nobody could act on (10 dB parts, and pocketsphinx at 15 dB). Beside each
calibration error, its 95% bootstrap interval over the judged utterances (the model held fixed,
1,000 resamples, a fixed seed), and the error a perfectly calibrated model would still show on
that many utterances (labels drawn from the confidences themselves, the mean over 1,000 draws):
with 10 bins and a few hundred results, sampling alone gives a few hundredths.

    python benchmarks/gate_transfer.py [--accept 0.8]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from relay.workbench.evaluate import calibration_error
from relay.workbench.gate_model import Row, fit_default, record, transfer
from stages.gate.confidence import ConfidenceModel, confidence

ROOT = Path(__file__).resolve().parents[1]
CORPORA = ("corpus.jsonl", "corpus-whisper.jsonl", "corpus-10db-pocketsphinx.jsonl", "corpus-10db-whisper.jsonl")
SCENARIOS = ("workshop", "boatyard")


def parts(rows: list[Row]) -> dict[str, list[Row]]:
    whisper_main = [r for r in rows if r.corpus == "corpus-whisper.jsonl" and r.snr_db in (None, 20, 25)]
    unusable = [r for r in rows if r.snr_db == 10 or (r.corpus == "corpus.jsonl" and r.snr_db == 15)]
    return {"whisper clean+20-25 dB": whisper_main, "10 dB + pocketsphinx 15 dB": unusable}


def ece_interval(p: Sequence[float], right: Sequence[bool], *, draws: int = 1000,
                 seed: int = 0) -> tuple[float, float]:
    """The 2.5th and 97.5th percentiles of the calibration error over bootstrap resamples of the
    confidences ``p`` and whether each result was ``right``."""
    rng = np.random.default_rng(seed)
    errors = []
    for _ in range(draws):
        pick = rng.integers(0, len(p), len(p))
        errors.append(calibration_error([p[i] for i in pick], [right[i] for i in pick]))
    low, high = np.percentile(errors, [2.5, 97.5])
    return float(low), float(high)


def ece_floor(p: Sequence[float], *, draws: int = 1000, seed: int = 0) -> float:
    """The mean calibration error of a perfectly calibrated model with the confidences ``p``:
    each result drawn right with the probability it is given."""
    chances = np.asarray(p)
    rng = np.random.default_rng(seed)
    return float(np.mean([calibration_error(list(p), (rng.random(len(p)) < chances).tolist())
                          for _ in range(draws)]))


def judged(model: ConfidenceModel, subset: Sequence[Row], *, accept: float) -> dict[str, float]:
    """``transfer``'s numbers for the model on ``subset``, with the calibration error's bootstrap
    interval and what a calibrated model would show on as many results."""
    p = [confidence(r.values, model) for r in subset]
    low, high = ece_interval(p, [r.right for r in subset])
    return transfer(model, subset, accept=accept) | {"ece_low": low, "ece_high": high, "ece_if_calibrated": ece_floor(p)}


def print_table(table: Sequence[dict[str, Any]]) -> None:
    """The rows of ``judged`` with where each model was fitted and judged, as a fixed-width table."""
    print(f"{'fitted on':9} {'judged on':9} {'part':27} {'n':>4} {'right':>6} {'AUC':>5} {'ECE':>5} {'ECE 95%':>11} {'ECE cal':>7} {'Brier':>5} "
          f"{'accept':>6} {'doubt':>6} {'policy':>6} {'wrongA':>6} {'wA/all':>6}")
    for r in table:
        print(f"{r['fitted_on']:9} {r['judged_on']:9} {r['part']:27} {r['utterances']:4.0f} {r['right']:6.1%} "
              f"{r['auc']:5.3f} {r['ece']:5.3f} {r['ece_low']:5.3f}-{r['ece_high']:5.3f} {r['ece_if_calibrated']:7.3f} {r['brier']:5.3f} {r['accepted']:6.1%} {r['asked_doubt']:6.1%} "
              f"{r['asked_policy']:6.1%} {r['wrong_accepts']:6.1%} {r['wrong_accepts_of_all']:6.1%}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--accept", type=float, default=0.8, help="accept_confidence to judge at (default 0.8)")
    parser.add_argument("--json", type=Path)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as cache:
        rows = {s: record([ROOT / "examples" / s], CORPORA, cache_dir=Path(cache)) for s in SCENARIOS}
    table = []
    for fitted in SCENARIOS:
        model = fit_default(rows[fitted])
        for judged_on in SCENARIOS:
            if judged_on == fitted:
                continue
            for part, subset in parts(rows[judged_on]).items():
                table.append({"fitted_on": fitted, "judged_on": judged_on, "part": part}
                             | judged(model, subset, accept=args.accept))
    print_table(table)
    if args.json is not None:
        args.json.write_text(json.dumps(table, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
