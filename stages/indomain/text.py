"""In-domain text for the language model (FORMATS section 4): plain text, CSV or JSON Lines
with a ``text`` column, ``{type}`` slots filled from a lexicon, tokenised like runtime text.

Every problem is an InputError naming the file and line, raised before anything is written.
"""

from __future__ import annotations

import csv
import itertools
import json
import random
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from tqdm import tqdm

from relay.core.errors import InputError
from stages.lexicon.data import read_lexicon
from stages.lm.kneser_ney import RESERVED
from stages.normalize.tokens import tokenize

__all__ = ["TextOptions", "TextFormat", "is_marker", "read_sentences", "read_slot_values", "read_templates", "slot_marker"]


def slot_marker(entity_type: str) -> str:
    """The token that stands for an entity of ``entity_type`` in marked text: ``{type}``."""
    return "{" + entity_type + "}"


def is_marker(token: str) -> bool:
    """Whether a token of marked text is an entity's ``{type}`` marker."""
    return token.startswith("{") and token.endswith("}")

TextFormat = Literal["auto", "plain", "csv", "jsonl"]

_SLOT = re.compile(r"\{([^{}\s]*)\}")
# The tokeniser would quietly turn "<s>" into "s"; catch the markers in the text itself.
_RESERVED_IN_TEXT = re.compile(r"</?s>|<unk>", re.IGNORECASE)
_PROGRESS_MIN_BYTES = 4 << 20  # below this a progress bar is noise


@dataclass(frozen=True, slots=True)
class TextOptions:
    """How in-domain text is read."""

    raw: bool = False  # whitespace-split tokens exactly as written, no tokeniser
    text_format: TextFormat = "auto"  # auto: .csv is CSV, .jsonl/.ndjson is JSON Lines, else plain
    max_line_chars: int = 10_000
    max_expansions: int = 20  # slot combinations kept per line
    seed: int = 0
    progress: bool | None = None  # None: a bar on large input when stderr is a terminal


def _format_of(path: Path, text_format: TextFormat) -> TextFormat:
    if text_format != "auto":
        return text_format
    suffix = path.suffix.lower()
    return "csv" if suffix == ".csv" else "jsonl" if suffix in (".jsonl", ".ndjson") else "plain"


# -- lexicon slots -------------------------------------------------------------------------

def read_slot_values(path: Path) -> dict[str, list[str]]:
    """Written forms (name and aliases) of the lexicon's entries, grouped by type.

    The lexicon is read by the lexicon stage's own loader, so build-lm and the relay agree on
    what a valid lexicon is; its problems are reported with their lines.
    """
    values: dict[str, dict[str, None]] = {}  # dicts as ordered sets
    for entry in read_lexicon(Path(path)):
        forms = [entry.name, *entry.aliases]
        values.setdefault(entry.type, {}).update(dict.fromkeys(f for f in forms if f))
    return {kind: list(forms) for kind, forms in values.items()}


def _expand(text: str, where: str, slots: dict[str, list[str]] | None, options: TextOptions) -> list[str]:
    names = _SLOT.findall(text)
    if not names:
        return [text]
    if slots is None:
        raise InputError("unknown_slot", f"{where}: slot {{{names[0]}}} needs a lexicon to fill it")
    for name in names:
        if name not in slots:
            known = ", ".join(sorted(slots)) or "none"
            raise InputError("unknown_slot", f"{where}: unknown slot type {{{name}}} (lexicon types: {known})")
    choices = [slots[name] for name in names]
    total = 1
    for forms in choices:
        total *= len(forms)
    if total <= options.max_expansions:
        combos: Sequence[Sequence[str]] = list(itertools.product(*choices))
    else:
        # Seeded by the line's own text, so a line expands the same wherever it sits.
        rng = random.Random(f"{options.seed}\0{text}")
        combos = []
        for index in sorted(rng.sample(range(total), options.max_expansions)):
            combo = []
            for forms in reversed(choices):
                index, pick = divmod(index, len(forms))
                combo.append(forms[pick])
            combos.append(combo[::-1])
    pieces = _SLOT.split(text)  # text, name, text, name, ..., text
    return ["".join(p if i % 2 == 0 else combo[i // 2] for i, p in enumerate(pieces)) for combo in combos]


# -- reading ---------------------------------------------------------------------------------

def _decoded_lines(path: Path, bar: tqdm[Any] | None) -> Iterator[tuple[int, str]]:
    pending = 0
    with path.open("rb") as handle:
        for number, raw in enumerate(handle, start=1):
            pending += len(raw)
            if bar is not None and pending > 1 << 20:
                bar.update(pending)
                pending = 0
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise InputError("not_utf8", f"{path}:{number}: not UTF-8 (byte {exc.start} of the line)") from None
            if number == 1:
                line = line.removeprefix("\ufeff")
            yield number, line.rstrip("\r\n")
    if bar is not None:
        bar.update(pending)


def _texts(path: Path, options: TextOptions, bar: tqdm[Any] | None) -> Iterator[tuple[str, str]]:
    """(location, text) for every record of one file."""
    kind = _format_of(path, options.text_format)
    lines = _decoded_lines(path, bar)
    if kind == "plain":
        for number, line in lines:
            yield f"{path}:{number}", line
    elif kind == "jsonl":
        for number, line in lines:
            if not line.strip():
                continue
            try:
                record = json.loads(line)
            except json.JSONDecodeError as exc:
                raise InputError("invalid_json", f"{path}:{number}: {exc.msg}") from None
            text = record.get("text") if isinstance(record, dict) else None
            if not isinstance(text, str):
                raise InputError("schema", f"{path}:{number}: needs a string field \"text\"")
            yield f"{path}:{number}", text
    else:
        numbered = iter(lines)
        current = [0]

        def feed() -> Iterator[str]:
            for number, line in numbered:
                current[0] = number
                yield line

        reader = csv.DictReader(feed())
        if "text" not in (reader.fieldnames or []):
            raise InputError("schema", f"{path}:1: CSV header needs a \"text\" column, has {reader.fieldnames}")
        for row in reader:
            text = row.get("text")
            if text is None:
                raise InputError("schema", f"{path}:{current[0]}: row has no \"text\" value")
            yield f"{path}:{current[0]}", text


def _tokens(text: str, where: str, options: TextOptions) -> list[str]:
    if options.raw:
        tokens = text.split()
        bad = [t for t in tokens if t in RESERVED]
        if bad:
            raise InputError("reserved_token", f"{where}: {bad[0]} is reserved for the model and cannot be in text")
        return tokens
    found = _RESERVED_IN_TEXT.search(text)
    if found:
        raise InputError("reserved_token", f"{where}: {found.group()} is reserved for the model and cannot be in text")
    return tokenize(text)


def read_sentences(
    paths: Sequence[Path],
    *,
    slots: dict[str, list[str]] | None = None,
    options: TextOptions = TextOptions(),
) -> Iterator[list[str]]:
    """Token lists, one per sentence (slot expansions included); blank lines are skipped.

    Raises InputError for the first bad line, and at the end when no sentence had a word.
    """
    paths = [Path(p) for p in paths]
    for path in paths:
        if not path.is_file():
            raise InputError("unreadable", f"{path}: no such file")
    total = sum(p.stat().st_size for p in paths)
    bar: tqdm[Any] | None = None
    if options.progress or (options.progress is None and total >= _PROGRESS_MIN_BYTES):
        # disable=None lets tqdm stay quiet when stderr is not a terminal (logs, pipes)
        disable = None if options.progress is None else False
        bar = tqdm(total=total, unit="B", unit_scale=True, desc="reading text", disable=disable)
    sentences = 0
    try:
        for path in paths:
            for where, text in _texts(path, options, bar):
                if len(text) > options.max_line_chars:
                    raise InputError(
                        "oversize", f"{where}: line of {len(text)} characters, limit {options.max_line_chars}"
                    )
                for expanded in _expand(text, where, slots, options):
                    tokens = _tokens(expanded, where, options)
                    if tokens:
                        sentences += 1
                        yield tokens
    finally:
        if bar is not None:
            bar.close()
    if sentences == 0:
        raise InputError("empty", f"{', '.join(map(str, paths))}: no words to build a model from")


def read_templates(path: Path, *, options: TextOptions = TextOptions()) -> Iterator[tuple[str, list[str]]]:
    """(location, tokens) for every non-blank line, slots kept unexpanded as ``{type}`` tokens.

    "book the {machine} for {person}" gives ["book", "the", "{machine}", "for", "{person}"].
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("unreadable", f"{path}: no such file")
    for where, text in _texts(path, options, None):
        if len(text) > options.max_line_chars:
            raise InputError("oversize", f"{where}: line of {len(text)} characters, limit {options.max_line_chars}")
        tokens: list[str] = []
        for i, piece in enumerate(_SLOT.split(text)):  # text, name, text, name, ..., text
            if i % 2:
                if not piece:
                    raise InputError("unknown_slot", f"{where}: empty slot {{}}")
                tokens.append(slot_marker(piece))
            else:
                tokens += _tokens(piece, where, options)
        if tokens:
            yield where, tokens
