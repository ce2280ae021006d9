"""The labelled corpus (docs/formats.md section 5): reading, validating and filtering by tags.

Every problem names the file and the line. The recogniser message inside each line is
validated by the same reader the live relay uses, so a corpus the evaluation accepts is one
the relay would accept too.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from relay.core.errors import InputError
from relay.core.fieldmap import FieldMap
from relay.core.utterance import Utterance
from relay.live.messages import parse_message

__all__ = ["CorpusItem", "TagFilter", "check_entity_ids", "json_objects", "parse_filter", "read_corpus", "tag_text"]


class ReferenceEntity(BaseModel):
    model_config = ConfigDict(extra="allow")

    id: str = Field(min_length=1)
    text: str | None = None


class CorpusLine(BaseModel):
    # Extra keys are allowed: formats grow by adding optional fields.
    model_config = ConfigDict(extra="allow")

    id: str = Field(min_length=1)
    reference: str
    entities: list[ReferenceEntity] = Field(default_factory=list)
    message: dict[str, Any]
    tags: dict[str, Any] = Field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class CorpusItem:
    """One labelled utterance; ``where`` is ``file:line`` for messages about it."""

    id: str
    reference: str
    entity_ids: frozenset[str]
    payload: bytes  # the recogniser message, re-encoded once
    tags: dict[str, Any]
    where: str
    field_map: FieldMap | None = None  # the relay's field map, for logs in a recogniser's own shape
    entity_texts: tuple[tuple[str, str], ...] = ()  # (id, words in reference) where the line gives them

    def utterance(self) -> Utterance:
        """A fresh Utterance, parsed exactly as the relay parses a message."""
        return parse_message(self.payload, topic=self.where, field_map=self.field_map, max_payload_bytes=1 << 30)


def _problem(error: ValidationError) -> str:
    first = error.errors()[0]
    field = ".".join(str(part) for part in first["loc"]) or "line"
    return f"field {field}: {first['msg']}"


def json_objects(path: Path, kind: str) -> Iterator[tuple[str, dict[str, Any]]]:
    """(``file:line``, object) for every non-blank line of a JSON Lines file; InputError of
    ``kind`` naming ``file:line`` on a line that is not UTF-8, not JSON or not an object."""
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(kind, f"{path}: cannot read ({exc.strerror})") from None
    for number, line in enumerate(raw.splitlines(), start=1):
        where = f"{path}:{number}"
        if not line.strip():
            continue
        try:
            line.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise InputError(kind, f"{where}: not UTF-8 text (byte {exc.start + 1} of the line is "
                                   f"{line[exc.start]:#04x}); save the file as UTF-8") from None
        try:
            data = orjson.loads(line)
        except orjson.JSONDecodeError as exc:
            raise InputError(kind, f"{where}: not valid JSON ({exc})") from None
        if not isinstance(data, dict):
            raise InputError(kind, f"{where}: expected a JSON object, got {type(data).__name__}")
        yield where, data


def read_corpus(path: str | Path, *, field_map: FieldMap | None = None) -> list[CorpusItem]:
    """All lines of a corpus file; InputError naming ``file:line`` on the first bad one."""
    items: list[CorpusItem] = []
    seen: dict[str, str] = {}
    for where, data in json_objects(Path(path), "corpus"):
        try:
            entry = CorpusLine.model_validate(data)
        except ValidationError as exc:
            raise InputError("corpus", f"{where}: {_problem(exc)}") from None
        if entry.id in seen:
            raise InputError("corpus", f"{where}: id {entry.id!r} already used at {seen[entry.id]}")
        seen[entry.id] = where
        item = CorpusItem(
            id=entry.id,
            reference=entry.reference,
            entity_ids=frozenset(e.id for e in entry.entities),
            payload=orjson.dumps(entry.message),
            tags=dict(entry.tags),
            where=where,
            field_map=field_map,
            entity_texts=tuple((e.id, e.text) for e in entry.entities if e.text),
        )
        try:
            item.utterance()
        except InputError as exc:
            raise InputError("corpus", f"{where}: message: {exc.detail.split(': ', 1)[-1]}") from None
        items.append(item)
    if not items:
        raise InputError("corpus", f"{path}: holds no utterances")
    return items


def check_entity_ids(items: list[CorpusItem], known: set[str], lexicon: str | Path) -> None:
    """InputError at the first line whose entity ids the lexicon lacks: no chain could ever find
    them, so every one would count as a miss."""
    unknown = [(item.where, eid) for item in items for eid in sorted(item.entity_ids - known)]
    if not unknown:
        return
    (where, first), rest = unknown[0], unknown[1:]
    more = ""
    if rest:
        shown = ", ".join(f"{eid} ({w.rsplit(':', 1)[-1]})" for w, eid in rest[:4])
        more = f"; {len(rest)} more: {shown}" + (", ..." if len(rest) > 4 else "") + " (ids with their lines)"
    raise InputError("corpus", f"{where}: entity id {first!r} is not in the lexicon {lexicon}{more}")


_CONDITION = re.compile(r"^\s*([A-Za-z_][\w.]*)\s*(==|=|!=)\s*(.*?)\s*$")


@dataclass(frozen=True, slots=True)
class TagFilter:
    """``tag=value[,value...]`` keeps matching lines, ``tag!=value[,...]`` leaves them out.

    Values compare as text; a missing tag or JSON null matches ``null``.
    """

    tag: str
    keep: bool
    values: frozenset[str]

    def __call__(self, item: CorpusItem) -> bool:
        return (tag_text(item.tags.get(self.tag)) in self.values) == self.keep

    def __str__(self) -> str:
        return f"{self.tag}{'=' if self.keep else '!='}{','.join(sorted(self.values))}"


def tag_text(value: Any) -> str:
    """A tag value as filters and reports write it: null, true/false, 15 for 15.0."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def parse_filter(expression: str) -> TagFilter:
    """Parse ``snr_db!=15`` or ``split=novel,seen``; ValueError explaining the form otherwise."""
    match = _CONDITION.match(expression)
    if match is None or not match.group(3):
        raise ValueError(f"{expression!r}: write TAG=VALUE or TAG!=VALUE (several values separated by commas)")
    tag, operator, values = match.groups()
    return TagFilter(tag=tag, keep=operator != "!=", values=frozenset(v.strip() for v in values.split(",")))
