"""Reading and checking lexicon files (CSV, YAML or JSON records) and speaker-affinity CSV.

Every problem is reported with the file and line it sits on, all problems of a file at once.
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from relay.core.errors import ConfigError
from stages.lexicon.sound.respell import RespellError, parse_say
from stages.normalize.tokens import tokenize

__all__ = ["COLUMNS", "LexiconEntry", "read_lexicon", "read_speakers"]

COLUMNS = ("id", "type", "name", "aliases", "say", "weight")
_REQUIRED = ("id", "type", "name")


@dataclass(frozen=True, slots=True)
class LexiconEntry:
    id: str
    type: str
    name: str
    aliases: tuple[str, ...]
    say: str | None
    weight: float
    line: int

    @property
    def forms(self) -> tuple[str, ...]:
        """The written forms (name first, then aliases) as normalised token strings."""
        seen: dict[str, None] = {}
        for text in (self.name, *self.aliases):
            tokens = " ".join(tokenize(text))
            if tokens:
                seen[tokens] = None
        return tuple(seen)


def _records_csv(text: str, path: Path) -> list[tuple[int, dict[str, Any]]]:
    """The rows as records; a header problem is the file's, reported once at line 1."""
    reader = csv.DictReader(io.StringIO(text))
    header = reader.fieldnames
    if header is None:
        return []
    unknown = [str(name) for name in header if name not in COLUMNS]
    missing = [name for name in _REQUIRED if name not in header]
    if unknown or missing:
        problems = [f"{path}:1: header: unknown column(s) {', '.join(unknown)}"] if unknown else []
        problems += [f"{path}:1: header: missing required column(s) {', '.join(missing)}"] if missing else []
        raise ConfigError(f"Lexicon {path} is invalid", [*problems, f"{path}:1: valid columns: {', '.join(COLUMNS)}"])
    records = []
    extra: list[str] = []
    for row in reader:
        if not any((value or "").strip() for value in row.values() if isinstance(value, str)):
            continue  # blank lines carry no record
        if None in row:  # csv puts fields past the header's under the key None
            extra.append(f"{path}:{reader.line_num}: {len(row[None])} field(s) more than the header's "
                         f"{len(header)} columns (a name with a comma needs \"quotes\")")
            continue
        records.append((reader.line_num, dict(row)))
    if extra:
        raise ConfigError(f"Lexicon {path} is invalid", extra)
    return records


def _records_tree(text: str, path: Path) -> list[tuple[int, dict[str, Any]]]:
    """YAML (and JSON, which YAML reads) records with the line each starts on."""
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = mark.line + 1 if mark is not None else 0
        raise ConfigError(f"Lexicon {path} cannot be read", [f"{path}:{line}: {exc}"]) from None
    if root is None:
        return []
    if isinstance(root, yaml.MappingNode):
        entries = [value for key, value in root.value if key.value == "entries"]
        if not entries:
            raise ConfigError(f"Lexicon {path} cannot be read",
                              [f"{path}:1: expected a list of records or a mapping with 'entries'"])
        root = entries[0]
    if not isinstance(root, yaml.SequenceNode):
        raise ConfigError(f"Lexicon {path} cannot be read", [f"{path}:1: expected a list of records"])
    records = []
    for node in root.value:
        value = yaml.SafeLoader(io.StringIO("")).construct_document(node)
        records.append((node.start_mark.line + 1, value))
    return records


def _check_record(path: Path, line: int, record: Any, problems: list[str]) -> LexiconEntry | None:
    where = f"{path}:{line}"
    if not isinstance(record, dict):
        problems.append(f"{where}: a record must be a mapping of column to value")
        return None
    unknown = sorted(str(k) for k in record if k not in COLUMNS)
    if unknown:
        problems.append(f"{where}: unknown column(s) {', '.join(unknown)} (valid: {', '.join(COLUMNS)})")
    values = {key: record.get(key) for key in COLUMNS}
    before = len(problems)
    for key in _REQUIRED:
        value = values[key]
        if not isinstance(value, str) or not value.strip():
            problems.append(f"{where}: {key} is required and must be non-empty text")
    aliases_raw = values["aliases"]
    if isinstance(aliases_raw, list):
        aliases = tuple(str(a).strip() for a in aliases_raw if str(a).strip())
    elif isinstance(aliases_raw, str):
        aliases = tuple(a.strip() for a in aliases_raw.split("|") if a.strip())
    elif aliases_raw is None:
        aliases = ()
    else:
        problems.append(f"{where}: aliases must be text separated by '|' or a list")
        aliases = ()
    weight_raw = values["weight"]
    weight = 1.0
    if weight_raw not in (None, ""):
        try:
            weight = float(weight_raw)
        except (TypeError, ValueError):
            problems.append(f"{where}: weight must be a number, got {weight_raw!r}")
        else:
            if not math.isfinite(weight) or weight <= 0:
                problems.append(f"{where}: weight must be a positive finite number, got {weight_raw!r}")
    name = str(values["name"] or "")
    if name.strip() and not tokenize(name):
        problems.append(f"{where}: name {name!r} has no words")
    say = values["say"]
    say_text = str(say).strip() if say not in (None, "") else None
    if say_text is not None:
        try:
            parse_say(say_text)
        except RespellError as exc:
            problems.append(f"{where}: say {say_text!r} cannot be read: {exc}")
    if len(problems) > before:
        return None
    return LexiconEntry(str(values["id"]).strip(), str(values["type"]).strip(), name.strip(),
                        aliases, say_text, weight, line)


def read_lexicon(path: Path) -> list[LexiconEntry]:
    """All entries of a lexicon file; ConfigError listing every problem with its line."""
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"Lexicon {path} cannot be read", [f"{path}: {exc}"]) from None
    suffix = path.suffix.lower()
    if suffix == ".csv":
        records = _records_csv(text, path)
    elif suffix in (".yaml", ".yml", ".json"):
        if suffix == ".json":
            try:
                json.loads(text)
            except json.JSONDecodeError as exc:
                raise ConfigError(f"Lexicon {path} cannot be read", [f"{path}:{exc.lineno}: {exc.msg}"]) from None
        records = _records_tree(text, path)
    else:
        raise ConfigError(f"Lexicon {path} has an unknown format",
                          [f"{path}: use .csv, .yaml, .yml or .json"])
    problems: list[str] = []
    entries: list[LexiconEntry] = []
    first_line: dict[str, int] = {}
    for line, record in records:
        entry = _check_record(path, line, record, problems)
        if entry is None:
            continue
        if entry.id in first_line:
            problems.append(f"{path}:{line}: duplicate id {entry.id!r} (first on line {first_line[entry.id]})")
            continue
        first_line[entry.id] = line
        entries.append(entry)
    if problems:
        raise ConfigError(f"Lexicon {path} is invalid", problems)
    if not entries:
        raise ConfigError(f"Lexicon {path} is invalid", [f"{path}: holds no entries"])
    return entries


def read_speakers(path: Path, known_ids: set[str]) -> dict[str, dict[str, float]]:
    """speaker -> entity id -> affinity in [0, 1], from a ``speaker,id,affinity`` CSV."""
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"Speaker file {path} cannot be read", [f"{path}: {exc}"]) from None
    reader = csv.DictReader(io.StringIO(text))
    if reader.fieldnames is None or set(reader.fieldnames) != {"speaker", "id", "affinity"}:
        raise ConfigError(f"Speaker file {path} is invalid",
                          [f"{path}:1: header must be speaker,id,affinity, got {reader.fieldnames}"])
    problems: list[str] = []
    table: dict[str, dict[str, float]] = {}
    for row in reader:
        where = f"{path}:{reader.line_num}"
        speaker, entity, raw = (row.get("speaker") or "").strip(), (row.get("id") or "").strip(), row.get("affinity")
        if not speaker or not entity:
            problems.append(f"{where}: speaker and id are required")
            continue
        if entity not in known_ids:
            problems.append(f"{where}: id {entity!r} is not in the lexicon")
            continue
        try:
            affinity = float(raw or "")
        except ValueError:
            problems.append(f"{where}: affinity must be a number in [0, 1], got {raw!r}")
            continue
        if not 0.0 <= affinity <= 1.0:
            problems.append(f"{where}: affinity must be in [0, 1], got {raw!r}")
            continue
        table.setdefault(speaker, {})[entity] = affinity
    if problems:
        raise ConfigError(f"Speaker file {path} is invalid", problems)
    return table
