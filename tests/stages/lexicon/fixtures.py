"""Shared set-up for lexicon tests that need a small lexicon with an in-domain model beside it."""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

from relay.core.chain import Chain
from relay.core.stage import StageContext
from relay.workbench.build_lm import build_model
from stages.lexicon.settings import LexiconSettings
from stages.lexicon.stage import LexiconStage
from stages.lm.kneser_ney import DiscountFallbackWarning
from stages.normalize.stage import NormalizeSettings, NormalizeStage


def write_folder(folder: Path, *, lexicon: str, train: str) -> Path:
    """lexicon.csv, train.txt and lm.arpa built from them, in ``folder``."""
    (folder / "lexicon.csv").write_text(lexicon)
    (folder / "train.txt").write_text(train)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiscountFallbackWarning)  # a toy corpus has too few counts
        build_model(train=folder / "train.txt", lexicon=folder / "lexicon.csv", output=folder / "lm.arpa")
    return folder


def lexicon_chain(folder: Path, **params: Any) -> Chain:
    """normalize -> lexicon over ``folder``'s files, loaded."""
    context = StageContext(base_dir=folder, cache_dir=folder / "cache")
    chain = Chain([NormalizeStage(NormalizeSettings(), context=context),
                   LexiconStage(LexiconSettings(**params), context=context)])
    chain.load()
    return chain
