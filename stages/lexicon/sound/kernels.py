"""The compiled kernels of the lexicon stage (stages/lexicon/sound/_lexfast.c), or None when they are not built.

``pip install`` compiles them where a C compiler and the Python headers exist; elsewhere the
numpy versions of the same computations run instead, with the same results. Setting
``REHEAR_NO_COMPILED=1`` uses the numpy versions even when the module is built, and so does a
module built from an older source that lacks one of the kernels or takes other arguments
(its ``version`` is below ``VERSION``).
"""

from __future__ import annotations

import os
from types import ModuleType

__all__ = ["compiled"]

FUNCTIONS = ("search", "alignment_costs", "g2p_decode", "word_spans", "pair_screen", "pair_finish", "pool_pairs",
             "merge_hits")
VERSION = 5  # KERNELS_VERSION in _lexfast.c: 3 since pair_screen and pair_finish, 4 since pool_pairs and merge_hits,
# 5 since search reads queries through a recast table


def _load() -> ModuleType | None:
    if os.environ.get("REHEAR_NO_COMPILED", "") not in ("", "0"):
        return None
    try:
        from stages.lexicon.sound import _lexfast
    except ImportError:
        return None
    if not all(hasattr(_lexfast, name) for name in FUNCTIONS) or getattr(_lexfast, "version", 1) < VERSION:
        return None  # built from an older _lexfast.c: numpy stands in until it is rebuilt
    return _lexfast


compiled = _load()
