"""What `rehear bench` measures on: a configuration and recogniser messages for it.

Without a configuration, the workshop example shipped inside the package (``example/``: its
relay.yaml, lexicon, speakers and in-domain text, and the 900 N-best lists its two recorded
corpora hold) is copied to a working folder, where its language model is built from the
in-domain text (``rehear build-lm`` gives examples/workshop/workshop.arpa byte for byte) and
its lexicon compiled. With a configuration, its own files; the messages come from ``--messages``
(recogniser messages or a labelled corpus, one JSON object a line) or are generated from the
configured lexicon's names (relay.workbench.synthetic).
"""

from __future__ import annotations

import gzip
import shutil
from dataclasses import dataclass
from pathlib import Path

import orjson

from relay.core.config import load_config
from relay.workbench.build_lm import build_model
from relay.workbench.synthetic import make_messages
from stages.lexicon.data import read_lexicon

__all__ = ["EXAMPLE", "Workload", "configured", "example", "generated_messages", "read_messages"]

EXAMPLE = Path(__file__).resolve().parent / "example"
EXAMPLE_FILES = ("relay.yaml", "lexicon.csv", "speakers.csv", "train.txt")


@dataclass(frozen=True, slots=True)
class Workload:
    config: Path
    messages: list[bytes]  # recogniser messages, JSON
    description: str


def read_messages(path: Path) -> list[bytes]:
    """Recogniser messages from JSONL (``.gz`` too): each line a message, or a labelled corpus line
    whose ``message`` is one."""
    data = path.read_bytes()
    if path.suffix == ".gz":
        data = gzip.decompress(data)
    out = []
    for line in data.splitlines():
        if not line.strip():
            continue
        row = orjson.loads(line)
        message = row.get("message", row) if isinstance(row, dict) else row
        if isinstance(message, dict) and "nbest" in message:
            out.append(orjson.dumps(message))
    return out


def generated_messages(names: list[str], count: int, seed: int = 8) -> list[bytes]:
    """10-best lists of everyday words with a name of ``names`` misheard in every third hypothesis."""
    return [orjson.dumps({"id": f"g{n}", "source": "kiosk-1", "nbest": [{"text": t} for t in texts]})
            for n, (_, texts) in enumerate(make_messages(names or ["anna"], count, seed))]


def example(workdir: Path) -> Workload:
    """The packaged workshop example, made ready in ``workdir`` (its lexicon cache too)."""
    workdir.mkdir(parents=True, exist_ok=True)
    for name in EXAMPLE_FILES:
        shutil.copyfile(EXAMPLE / name, workdir / name)
    build_model(train=workdir / "train.txt", lexicon=workdir / "lexicon.csv", output=workdir / "workshop.arpa")
    messages = read_messages(EXAMPLE / "messages.jsonl.gz")
    return Workload(workdir / "relay.yaml", messages,
                    f"the workshop example: {len(messages)} recorded N-best lists, 122-entry lexicon")


def configured(config: Path, messages: Path | None, *, count: int = 400) -> Workload:
    """``config`` with the messages of ``messages``, or generated from its lexicon's names."""
    if messages is not None:
        found = read_messages(messages)
        if not found:
            raise ValueError(f"{messages}: no recogniser message (a JSON object with nbest) in it")
        return Workload(config, found, f"{config.name}: {len(found)} messages from {messages.name}")
    loaded = load_config(config)
    lexicon = loaded.domain.lexicon
    for spec in loaded.config.stages:
        if spec.name == "lexicon" and isinstance(spec.params.get("lexicon"), str):
            lexicon = loaded.base_dir / spec.params["lexicon"]
    names = [entry.name for entry in read_lexicon(lexicon)] if lexicon is not None else []
    return Workload(config, generated_messages(names, count),
                    f"{config.name}: {count} generated 10-best lists" + (f" around {len(names)} lexicon names"
                                                                         if names else ""))
