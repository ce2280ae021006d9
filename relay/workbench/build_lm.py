"""Estimate the in-domain language model from in-domain text and write it as ARPA."""

from __future__ import annotations

import sys
import warnings
from collections.abc import Sequence
from pathlib import Path

from stages.indomain.text import TextOptions, read_sentences, read_slot_values
from stages.lm.arpa import write_arpa
from stages.lm.kneser_ney import DEFAULT_FALLBACK, DiscountFallbackWarning, KneserNeyModel, estimate

__all__ = ["build_model"]


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
    return model
