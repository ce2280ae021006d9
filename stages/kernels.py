"""The compiled kernels of the lexicon stage (stages/_lexfast.c), or None when they are not built.

``pip install`` compiles them where a C compiler and the Python headers exist; elsewhere the
numpy versions of the same computations run instead, with the same results. Setting
``REHEAR_NO_COMPILED=1`` uses the numpy versions even when the module is built.
"""

from __future__ import annotations

import os
from types import ModuleType

__all__ = ["compiled"]


def _load() -> ModuleType | None:
    if os.environ.get("REHEAR_NO_COMPILED", "") not in ("", "0"):
        return None
    try:
        from stages import _lexfast
    except ImportError:
        return None
    return _lexfast


compiled = _load()
