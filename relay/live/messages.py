"""The public message formats: the recogniser message in, the cleaned message out.

The reader validates with pydantic and raises InputError with a bounded ``reason`` and a
detail naming the field; the writer renders plain dicts (orjson) because it runs per message.
"""

from __future__ import annotations

import re
import time
from typing import Any, Literal

import orjson
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from relay.core.errors import InputError
from relay.core.fieldmap import FieldMap
from relay.core.utterance import Hypothesis, Utterance

__all__ = [
    "CleanedMessage",
    "NbestEntry",
    "RecogniserMessage",
    "dump",
    "parse_message",
    "render_cleaned",
    "render_passthrough",
    "word_load",
]

MAX_HYPOTHESES = 50  # docs/formats.md section 1: 1..50 items
# orjson reads JSON nested 1024 levels deep but writes at most 254 (its recursion limit), so a
# deeper message would parse and then fail when its result is rendered. Refused at parse time.
MAX_NESTING = 200
_DIGIT = re.compile("[0-9]")  # what str.count counted digit by digit: ASCII digits only


class NbestEntry(BaseModel):
    model_config = ConfigDict(extra="allow")

    text: str
    conf: float | None = Field(None, ge=0.0, le=1.0)
    logprob: float | None = Field(None, le=0.0)


class RecogniserMessage(BaseModel):
    """docs/formats.md section 1. Unknown fields are kept and passed through."""

    model_config = ConfigDict(extra="allow")

    id: str = Field(min_length=1, max_length=128)
    source: str | None = None
    speaker: str | None = None
    final: bool = True
    nbest: list[NbestEntry] = Field(min_length=1, max_length=MAX_HYPOTHESES)


class EntityOut(BaseModel):
    id: str
    type: str
    name: str
    span: tuple[int, int]
    heard: str
    score: float


class CorrectionOut(BaseModel):
    stage: str
    before: str
    after: str
    score: float
    reason: str


class TraceOut(BaseModel):
    stage: str
    elapsed_us: float
    scores: dict[str, Any] = {}


class RelayInfo(BaseModel):
    model_config = ConfigDict(extra="allow")

    version: str
    config_hash: str
    received_at: float
    published_at: float


class CleanedMessage(RecogniserMessage):
    """docs/formats.md section 2: everything in the input, plus what the relay decided."""

    text: str
    entities: list[EntityOut] = []
    corrections: list[CorrectionOut] = []
    decision: Literal["accept", "confirm", "reprompt"] | None = None
    prompt: str | None = None
    trace: list[TraceOut] = []
    relay: RelayInfo


def _describe(error: ValidationError) -> str:
    first = error.errors()[0]
    where = ".".join(str(part) for part in first["loc"]) or "message"
    value = first.get("input")
    shown = repr(value) if not isinstance(value, (dict, list)) else type(value).__name__
    extra = f" ({len(error.errors()) - 1} more)" if len(error.errors()) > 1 else ""
    return f"field {where}: {first['msg']}, got {shown[:80]}{extra}"


def parse_message(
    payload: bytes,
    *,
    topic: str,
    field_map: FieldMap | None = None,
    max_payload_bytes: int = 262_144,
    max_hypotheses: int = MAX_HYPOTHESES,
) -> Utterance:
    """Validate one recogniser message and turn it into an Utterance."""
    if len(payload) > max_payload_bytes:
        raise InputError("oversize", f"topic {topic}: payload of {len(payload)} bytes exceeds {max_payload_bytes}")
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError("not_utf8", f"topic {topic}: byte {exc.start} is not UTF-8") from None
    try:
        data = orjson.loads(text)
    except orjson.JSONDecodeError as exc:
        raise InputError("invalid_json", f"topic {topic}: {exc}") from None
    if not isinstance(data, dict):
        raise InputError("schema", f"topic {topic}: expected a JSON object, got {type(data).__name__}")
    # Nesting cannot be deeper than the number of brackets: two C scans rule it out for almost
    # every message, and only a bracket-heavy one pays for the walk.
    if payload.count(b"[") + payload.count(b"{") > MAX_NESTING and _depth(data) > MAX_NESTING:
        raise InputError("too_deep", f"topic {topic}: nested more than {MAX_NESTING} levels deep")
    if field_map is not None and not field_map.is_identity:
        data = field_map.apply(data, topic=topic)
    nbest = data.get("nbest")
    if isinstance(nbest, list) and len(nbest) > max_hypotheses:
        raise InputError(
            "too_many_hypotheses", f"topic {topic}: field nbest has {len(nbest)} items, at most {max_hypotheses}"
        )
    try:
        message = RecogniserMessage.model_validate(data)
    except ValidationError as exc:
        raise InputError("schema", f"topic {topic}: {_describe(exc)}") from None
    # Keep the message as received (validated above) so unknown fields pass through unchanged.
    # positional arguments and the uniform posterior passed in: the same objects, sooner
    fields, share = data["nbest"], 1.0 / len(message.nbest)
    hypotheses = [Hypothesis(entry.text, rank, fields[rank], entry.text.split(), share)
                  for rank, entry in enumerate(message.nbest)]
    return Utterance(
        id=message.id,
        source=message.source or topic,
        speaker=message.speaker,
        payload=data,
        nbest=hypotheses,
    )


def _depth(value: Any) -> int:
    """How deeply lists and objects nest in ``value``, without recursion (its depth is the question)."""
    deepest = 0
    stack: list[tuple[Any, int]] = [(value, 1)]
    while stack:
        item, level = stack.pop()
        if isinstance(item, dict):
            children: Any = item.values()
        elif isinstance(item, list):
            children = item
        else:
            continue
        deepest = max(deepest, level)
        if deepest > MAX_NESTING:
            return deepest
        stack.extend((child, level + 1) for child in children if isinstance(child, (dict, list)))
    return deepest


def word_load(texts: list[str], *, max_word_chars: int) -> tuple[int, int]:
    """(most words in one text, words in all texts), counted from the raw text before tokenising.

    What the chain costs grows with the words it sees after tokenising, so the count leans that
    way: each digit counts as a word too (numbers are spelled out, "20000" is "twenty thousand",
    a long digit run one word per digit), and a word longer than ``max_word_chars`` counts once
    per that many characters (an unknown word is pronounced letter by letter).
    """
    most = total = 0
    for text in texts:
        words = text.split()
        # one scan for all ten digits; ten str.count calls per text cost about twice as much
        count = len(words) + len(_DIGIT.findall(text))
        if words and len(text) > max_word_chars and max(map(len, words)) > max_word_chars:
            count += sum(len(word) // max_word_chars for word in words if len(word) > max_word_chars)
        if count > most:
            most = count
        total += count
    return most, total


def render_cleaned(utterance: Utterance, *, relay: dict[str, Any], published_at: Any = None) -> dict[str, Any]:
    """The cleaned message (docs/formats.md section 2) as a plain dict; ``relay.published_at``
    is now unless ``published_at`` stands in for it."""
    out = dict(utterance.payload)
    out["text"] = utterance.text
    nbest = []
    for hypothesis in utterance.ranked():
        item = dict(hypothesis.fields)
        item["posterior"] = hypothesis.posterior
        if hypothesis.merged > 1:
            item["merged"] = hypothesis.merged
        nbest.append(item)
    out["nbest"] = nbest
    out["entities"] = [
        {"id": e.id, "type": e.type, "name": e.name, "span": list(e.span), "heard": e.heard, "score": e.score}
        for e in utterance.entities
    ]
    out["corrections"] = [
        {"stage": c.stage, "before": c.before, "after": c.after, "score": c.score, "reason": c.reason}
        for c in utterance.corrections
    ]
    if utterance.decision is not None:
        out["decision"] = utterance.decision
    if utterance.prompt is not None and utterance.decision != "accept":
        out["prompt"] = utterance.prompt
    out["trace"] = [{"stage": t.stage, "elapsed_us": t.elapsed_us, "scores": t.scores} for t in utterance.trace]
    out["relay"] = dict(relay)
    out["relay"].setdefault("published_at", time.time() if published_at is None else published_at)
    return out


def render_passthrough(utterance: Utterance, *, relay: dict[str, Any], reason: str) -> dict[str, Any]:
    """The original message forwarded as is, flagged, when the chain could not finish in time."""
    out = dict(utterance.payload)
    out["text"] = utterance.payload["nbest"][0]["text"]
    out["relay"] = dict(relay, passthrough=reason)
    out["relay"].setdefault("published_at", time.time())
    return out


def dump(message: dict[str, Any]) -> bytes:
    return orjson.dumps(message, option=orjson.OPT_SERIALIZE_NUMPY)
