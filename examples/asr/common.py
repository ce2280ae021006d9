"""What every recogniser module shares: reading audio and shaping a recogniser message."""

from __future__ import annotations

import wave
from pathlib import Path
from typing import Any

SAMPLE_RATE = 16000
DEFAULT_TOP = 10


class AudioFormatError(ValueError):
    """The audio is not 16 kHz mono 16-bit PCM."""


def read_pcm(path: Path) -> bytes:
    """Return the raw samples of a 16 kHz mono 16-bit WAV file."""
    try:
        with wave.open(str(path), "rb") as wav:
            shape = (wav.getframerate(), wav.getnchannels(), wav.getsampwidth())
            if shape != (SAMPLE_RATE, 1, 2):
                raise AudioFormatError(
                    f"{path}: need 16000 Hz mono 16-bit PCM, got {shape[0]} Hz, "
                    f"{shape[1]} channel(s), {8 * shape[2]}-bit"
                )
            return wav.readframes(wav.getnframes())
    except wave.Error as exc:
        raise AudioFormatError(f"{path}: not a readable WAV file ({exc})") from exc


def write_pcm(path: Path, pcm: bytes) -> None:
    """Write 16 kHz mono 16-bit samples as a WAV file."""
    with wave.open(str(path), "wb") as wav:
        wav.setnchannels(1)
        wav.setsampwidth(2)
        wav.setframerate(SAMPLE_RATE)
        wav.writeframes(pcm)


def build_message(
    utt_id: str,
    nbest: list[dict[str, Any]],
    source: str | None = None,
    speaker: str | None = None,
) -> dict[str, Any]:
    """A recogniser message (FORMATS section 1) for one final result."""
    message: dict[str, Any] = {"id": utt_id}
    if source is not None:
        message["source"] = source
    if speaker is not None:
        message["speaker"] = speaker
    message["final"] = True
    message["nbest"] = nbest
    return message
