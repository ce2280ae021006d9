"""Recognise one utterance with pocketsphinx.

Shared by the corpus recorder and the MQTT bridge so both produce identical N-best
lists. Uses the generic English model bundled with the pocketsphinx wheel and its
default decoder settings.
"""

from __future__ import annotations

import math
from itertools import islice
from pathlib import Path
from typing import Any

from examples.asr.common import DEFAULT_TOP, read_pcm

NAME = "pocketsphinx"
# Changes whenever the output for the same audio would change. 2: the best path's posterior as `conf`.
RECIPE = "2"


def prepare(threads: int | None = None) -> None:
    """Nothing to load ahead: every utterance gets a fresh Decoder (see recognise_pcm)."""


def score_to_logprob(score: float) -> float:
    """Natural-log total score of an N-best entry.

    The binding reports `score` as 1.0001 ** (internal_score / 1024) while the
    internal score is in units of log base 1.0001, so ln(total) = 1024 * ln(score).
    Checked against the per-word acoustic and language scores of `Decoder.seg()`.
    """
    if score <= 0.0:
        # exp() underflowed: the hypothesis is astronomically unlikely.
        return -1.0e6
    # Rounding can push a near-certain total a hair above zero; the format wants <= 0.
    return min(0.0, 1024.0 * math.log(score))


def recognise_pcm(pcm: bytes, top: int = DEFAULT_TOP) -> list[dict[str, Any]]:
    """Decode 16 kHz mono 16-bit samples; return up to `top` N-best items.

    A fresh Decoder per utterance: a reused one adapts its cepstral mean and so
    changes the scores of later utterances. The N-best order and duplicates are
    kept exactly as the decoder yields them (entry one is not always the best
    scored). `prob` of an N-best item is always 1.0, not a posterior; the
    decoder's best path does have one (`Decoder.hyp().prob`, from the lattice),
    so the N-best item with the best path's text carries it as `conf`: the
    recogniser's own confidence, low where noise left it guessing.
    """
    # Imported here so `--help` works without loading the model.
    from pocketsphinx import Decoder

    decoder = Decoder(loglevel="FATAL")
    decoder.start_utt()
    decoder.process_raw(pcm, full_utt=True)
    decoder.end_utt()
    items = [
        {"text": hyp.hypstr, "logprob": round(score_to_logprob(hyp.score), 3)}
        for hyp in islice(decoder.nbest(), top)
    ]
    best = decoder.hyp()
    if not items:
        # No lattice (e.g. silence): fall back to the single best path, or empty text.
        if best is None:
            items = [{"text": ""}]
        else:
            items = [{"text": best.hypstr, "logprob": round(score_to_logprob(best.score), 3)}]
    if best is not None:
        for item in items:
            if item["text"] == best.hypstr:
                item["conf"] = float(f"{min(max(best.prob, 0.0), 1.0):.4g}")
                break
    return items


def recognise_file(path: Path, top: int = DEFAULT_TOP) -> list[dict[str, Any]]:
    """Decode one WAV file (16 kHz mono 16-bit)."""
    return recognise_pcm(read_pcm(path), top)
