"""Grapheme-to-phoneme conversion for words the pronouncing dictionary lacks.

The model is a pruned letter-context tree in the manner of IGTree (Daelemans, van den Bosch
and Weijters 1997, "IGTree: using trees for compression and classification in lazy learning
algorithms"): each letter, seen through a window of its neighbours, maps to zero, one or two
phones. Context features are tested in a fixed order (the letter, then the nearest letters
right and left, widening outwards); a node is stored only where its majority label differs
from its parent's or a descendant needs it, so the tree is small and lookup is a handful of
dict probes per letter. scripts/train_g2p.py learns it from CMUdict after a letter-to-phone
alignment found by hard EM.
"""

from __future__ import annotations

import gzip
import json
import re
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

from relay.errors import StageError

__all__ = ["FEATURE_ORDER", "PAD", "G2PModel", "context_key", "default_model", "feature_order"]

PAD = "#"
# Offsets of the letters a node tests, in order: the letter itself, then outwards, right first
# (in English spelling the following letters decide more: "c" before "e", silent final "e").
FEATURE_ORDER: tuple[int, ...] = (0, 1, -1, 2, -2, 3, -3, 4, -4)
_LETTERS = re.compile(r"[a-z]")
MODEL_FILE = "g2p_tree.json.gz"


def feature_order(window: int) -> tuple[int, ...]:
    """The letter, then its neighbours outwards to ``window`` letters, right before left."""
    return (0, *[o for d in range(1, window + 1) for o in (d, -d)])


def context_key(letters: str, index: int, order: tuple[int, ...] = FEATURE_ORDER) -> str:
    """The full feature string of the letter at ``index``; prefixes of it are tree nodes."""
    out = []
    for offset in order:
        position = index + offset
        out.append(letters[position] if 0 <= position < len(letters) else PAD)
    return "".join(out)


class G2PModel:
    """Predicts an ARPAbet phone sequence (stress-free) for a spelled word."""

    def __init__(self, nodes: dict[str, str], *, info: dict[str, Any] | None = None,
                 order: tuple[int, ...] = FEATURE_ORDER) -> None:
        self.nodes = nodes
        self.info = info or {}
        self.order = order
        # _predict reads contexts from the word padded by this many PAD marks on each side.
        self._reach = max((abs(offset) for offset in order), default=0)
        self._cached = lru_cache(maxsize=65536)(self._predict)

    @classmethod
    def from_file(cls, path: Path | str) -> G2PModel:
        try:
            with gzip.open(path, "rt", encoding="utf-8") as handle:
                data = json.load(handle)
        except (OSError, ValueError) as exc:
            raise StageError("lexicon", f"cannot read G2P model {path}: {exc}") from None
        labels: list[str] = data["labels"]
        nodes = {key: labels[index] for key, index in data["nodes"].items()}
        order = tuple(data.get("feature_order", FEATURE_ORDER))
        return cls(nodes, info=data.get("info", {}), order=order)

    def to_file(self, path: Path | str) -> None:
        labels = sorted(set(self.nodes.values()))
        index = {label: i for i, label in enumerate(labels)}
        data = {
            "format": 1,
            "feature_order": list(self.order),
            "info": self.info,
            "labels": labels,
            "nodes": {key: index[label] for key, label in sorted(self.nodes.items())},
        }
        with gzip.open(path, "wt", encoding="utf-8", compresslevel=9) as handle:
            json.dump(data, handle, separators=(",", ":"))

    def label(self, features: str) -> str:
        """The label of the deepest stored node along ``features``."""
        found = ""
        for depth in range(1, len(features) + 1):
            label = self.nodes.get(features[:depth])
            if label is None:
                break
            found = label
        return found

    def _predict(self, word: str) -> tuple[str, ...]:
        letters = "".join(_LETTERS.findall(word.lower()))
        # context_key and label inlined: the word is padded once (letters are a-z, never PAD),
        # so each context is a plain gather of characters.
        reach = self._reach
        padded = PAD * reach + letters + PAD * reach
        offsets = [offset + reach for offset in self.order]
        nodes = self.nodes
        phones: list[str] = []
        for index in range(len(letters)):
            features = "".join([padded[index + offset] for offset in offsets])
            label = ""
            for depth in range(1, len(features) + 1):
                found = nodes.get(features[:depth])
                if found is None:
                    break
                label = found
            if label:
                phones.extend(label.split(" "))
        return tuple(phones)

    def predict(self, word: str) -> tuple[str, ...]:
        """Phones for ``word``; characters other than the letters a-z are ignored."""
        result: tuple[str, ...] = self._cached(word)
        return result


@lru_cache(maxsize=1)
def default_model() -> G2PModel:
    """The model shipped as package data (stages/data/g2p_tree.json.gz)."""
    path = resources.files("stages") / "data" / MODEL_FILE
    with resources.as_file(path) as real_path:
        return G2PModel.from_file(real_path)
