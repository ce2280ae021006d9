"""Writing and reading the ARPA back-off language model format.

An entry is ``log10 p(w|h) <TAB> h w [<TAB> log10 backoff(hw)]``. The writer goes through a
temporary file in the target directory and renames it, so a failure never leaves a half-written
model behind. The reader exists for checks and tools; the relay itself loads models with kenlm.
"""

from __future__ import annotations

import math
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import TextIO

from relay.core.errors import InputError
from stages.lm.kneser_ney import BOS, KneserNeyModel

__all__ = ["ArpaEntry", "read_arpa", "write_arpa"]

ArpaEntry = tuple[float, float]  # (log10 probability, log10 backoff)


def _fmt(value: float) -> str:
    # 7 significant digits is more than float32 readers keep, and round-trips to 1e-7
    text = f"{value:.7g}"
    return "0" if text == "-0" else text


def _entries(model: KneserNeyModel, k: int) -> Iterator[str]:
    probs = model.probs[k]
    backoffs = model.backoffs[k]
    has_backoff = k < model.order - 1
    grams = list(model.counts[k])
    grams.sort()
    for gram in grams:
        words = " ".join(gram)
        # <s> is never predicted: its probability field holds 0 by convention
        logp = 0.0 if gram == (BOS,) else math.log10(probs[gram])
        if has_backoff:
            gamma = backoffs.get(gram)
            logb = math.log10(gamma) if gamma else 0.0
            yield f"{_fmt(logp)}\t{words}\t{_fmt(logb)}\n"
        else:
            yield f"{_fmt(logp)}\t{words}\n"


def _write(model: KneserNeyModel, out: TextIO) -> None:
    out.write("\n\\data\\\n")
    out.writelines(f"ngram {k + 1}={len(model.counts[k])}\n" for k in range(model.order))
    for k in range(model.order):
        out.write(f"\n\\{k + 1}-grams:\n")
        out.writelines(_entries(model, k))
    out.write("\n\\end\\\n")


def write_arpa(model: KneserNeyModel, path: Path) -> None:
    """Write the model as ARPA text to ``path``, atomically."""
    path = Path(path)
    directory = path.parent if str(path.parent) else Path(".")
    handle, temp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=directory)
    try:
        with os.fdopen(handle, "w", encoding="utf-8", newline="\n") as out:
            _write(model, out)
        os.replace(temp_name, path)
    except BaseException:
        Path(temp_name).unlink(missing_ok=True)
        raise


def read_arpa(path: Path) -> list[dict[tuple[str, ...], ArpaEntry]]:
    """Entries per order (index k-1 holds the k-grams); a missing backoff reads as 0."""
    path = Path(path)
    orders: list[dict[tuple[str, ...], ArpaEntry]] = []
    declared: list[int] = []
    section = 0
    with path.open(encoding="utf-8") as lines:
        for number, raw in enumerate(lines, start=1):
            line = raw.strip()
            if not line or line == "\\data\\" or line == "\\end\\":
                continue
            if line.startswith("ngram ") and section == 0:
                declared.append(int(line.split("=", 1)[1]))
                continue
            if line.startswith("\\") and line.endswith("-grams:"):
                section = int(line[1:].split("-", 1)[0])
                orders.append({})
                continue
            fields = line.split("\t") if "\t" in line else line.split()
            try:
                if "\t" in line:
                    gram = tuple(fields[1].split())
                    backoff = float(fields[2]) if len(fields) > 2 else 0.0
                else:
                    gram = tuple(fields[1:1 + section])
                    backoff = float(fields[1 + section]) if len(fields) > 1 + section else 0.0
                logp = float(fields[0])
            except (ValueError, IndexError):
                raise InputError("schema", f"{path}:{number}: not an ARPA entry: {line[:80]!r}") from None
            if section == 0 or len(gram) != section:
                raise InputError("schema", f"{path}:{number}: expected a {section}-gram, got {line[:80]!r}")
            orders[-1][gram] = (logp, backoff)
    for k, expected in enumerate(declared):
        if k >= len(orders) or len(orders[k]) != expected:
            found = len(orders[k]) if k < len(orders) else 0
            raise InputError("schema", f"{path}: header declares {expected} {k + 1}-grams, found {found}")
    return orders
