"""Small labelled corpora written on the fly for evaluation and tuning tests."""

from __future__ import annotations

import json
import random
from pathlib import Path
from typing import Any

WORDS = ["book", "the", "lathe", "bandsaw", "for", "bay", "two", "three", "at", "four", "kiln", "sander"]


def corpus_line(index: int, rng: random.Random) -> dict[str, Any]:
    reference = " ".join(rng.choice(WORDS) for _ in range(rng.randint(2, 6)))
    hard = rng.random() < 0.4
    first = reference if not hard else " ".join(rng.choice(WORDS) for _ in range(rng.randint(1, 6)))
    top = rng.uniform(0.2, 0.5) if hard else rng.uniform(0.6, 0.95)
    # Without a lexicon stage nothing is found, so an utterance is right only when its
    # reference names no entity: make the confident ones those.
    entities = [{"id": "machine.lathe", "text": "lathe"}] if hard else []
    return {
        "id": f"t-{index:04d}",
        "reference": reference,
        "entities": entities,
        "message": {"id": f"t-{index:04d}", "nbest": [
            {"text": first, "conf": round(top, 3)},
            {"text": reference, "conf": round((1 - top) * 0.6, 3)},
            {"text": "the " + reference, "conf": round((1 - top) * 0.4, 3)},
        ]},
        "tags": {"snr_db": rng.choice([None, 25, 15]), "split": rng.choice(["seen", "novel"])},
    }


def write_corpus(path: Path, count: int, *, seed: int = 7) -> Path:
    rng = random.Random(seed)
    path.write_text("".join(json.dumps(corpus_line(i, rng)) + "\n" for i in range(count)), encoding="utf-8")
    return path


def write_config(path: Path, gate: str = "gate") -> Path:
    path.write_text(f"stages:\n  - normalize:\n      prefer: conf\n  - {gate}\n", encoding="utf-8")
    return path
