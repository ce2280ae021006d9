"""Estimate the in-domain language model from in-domain text and write it as ARPA."""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import warnings
from collections.abc import Sequence
from pathlib import Path

from relay.core.errors import WorkFailed
from relay.workbench.written import apply_umask
from stages.indomain.text import TextOptions, read_sentences, read_slot_values
from stages.lm.arpa import write_arpa
from stages.lm.kneser_ney import DEFAULT_FALLBACK, DiscountFallbackWarning, KneserNeyModel, estimate

__all__ = ["build_model", "write_binary"]

# build_binary reads the ARPA once and writes a probing hash table; a 5 MB model takes about a
# second, so a minute is far past any sane run.
_BINARY_TIMEOUT_S = 600


def build_model(
    *,
    train: Path | Sequence[Path],
    output: Path,
    lexicon: Path | None = None,
    order: int = 3,
    options: TextOptions | None = None,
    fallback: Sequence[float] = DEFAULT_FALLBACK,
) -> KneserNeyModel:
    """Read in-domain text, estimate the model and write it as ARPA (atomically).

    Discount fallbacks are reported on stderr, naming the order.
    """
    paths = [train] if isinstance(train, Path) else list(train)
    slots = read_slot_values(lexicon) if lexicon is not None else None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", DiscountFallbackWarning)
        model = estimate(read_sentences(paths, slots=slots, options=options or TextOptions()), order,
                         fallback=fallback)
    for warning in caught:
        print(f"warning: {warning.message}", file=sys.stderr)
    write_arpa(model, output)
    apply_umask(output)  # written through a 0600 temporary file; readable as any other file
    return model


def write_binary(arpa: Path, output: Path, *, builder: str) -> None:
    """kenlm's binary form of ``arpa``, written by its ``build_binary`` program, atomically."""
    descriptor, temporary = tempfile.mkstemp(dir=output.parent, prefix=f".{output.name}.", suffix=".part")
    os.close(descriptor)
    Path(temporary).unlink()  # build_binary creates the file itself; the name is reserved enough
    try:
        done = subprocess.run([builder, str(arpa), temporary], capture_output=True, text=True,
                              timeout=_BINARY_TIMEOUT_S, check=False)
        if done.returncode != 0 or not Path(temporary).is_file():
            last = (done.stderr or done.stdout).strip().splitlines()[-1:] or ["no output"]
            raise WorkFailed(f"{builder} failed on {arpa} (exit {done.returncode}): {last[0]}")
        apply_umask(Path(temporary))
        Path(temporary).replace(output)
    except subprocess.TimeoutExpired:
        raise WorkFailed(f"{builder} did not finish within {_BINARY_TIMEOUT_S} s") from None
    finally:
        Path(temporary).unlink(missing_ok=True)
