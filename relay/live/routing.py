"""What the relay publishes for one input: pure functions from a result to outgoing messages.

No network here; the service sends what these return, then acknowledges the input. A finished
result is rendered where its chain ran (``render``: a worker process or the chain's thread) and
turned into messages on the event loop (``outgoing``), which writes ``published_at`` in.
"""

from __future__ import annotations

import base64
import secrets
import time
from dataclasses import dataclass
from typing import Any

import orjson
from pydantic import TypeAdapter

from relay.core.errors import InputError
from relay.core.settings import TopicSettings
from relay.core.utterance import Utterance
from relay.live.messages import dump, render_cleaned, render_passthrough
from relay.live.topics import clean_text, render_topic

__all__ = ["Outgoing", "RenderError", "Rendered", "dead_letter", "is_final", "outgoing", "partial", "passthrough",
           "render"]

_BOOL = TypeAdapter(bool)


@dataclass(frozen=True, slots=True)
class Outgoing:
    """One message to publish; ``properties`` become MQTT 5 user properties; ``kind`` says
    which configured topic it goes to (output, prompt, dead_letter)."""

    topic: str
    payload: bytes
    qos: int
    properties: dict[str, str] | None = None
    kind: str = "output"


@dataclass(frozen=True, slots=True)
class Rendered:
    """A finished utterance rendered where its chain ran (a worker process, or the chain's thread):
    what the relay still needs to publish it and to count it. Small, so it crosses a pipe cheaply."""

    message: bytes | None  # the cleaned message, relay.published_at marked; None: not forwarded
    prompt: bytes | None  # the prompt, when the gate asks back and has one
    values: dict[str, object]  # source, speaker, decision: what the topic templates read
    last_stage: str
    stage_us: tuple[tuple[str, float], ...]  # each trace entry's stage and elapsed microseconds
    corrections: tuple[str, ...]  # the stage of each correction
    decision: str | None


class RenderError(Exception):
    """The finished utterance could not be rendered (a value no stage should have left in it)."""


# Stands in for relay.published_at until the relay takes the result to publish it, so that the
# time is the same moment as when the relay renders the message itself. A NUL and a nonce drawn
# per run: no text a message carries can hold it.
_PUBLISHED_MARK = "\x00published_at " + secrets.token_hex(8)
_PUBLISHED_MARK_JSON = orjson.dumps(_PUBLISHED_MARK)


def render(utterance: Utterance, relay: dict[str, Any], *, forward_unsure: bool) -> Rendered:
    """The cleaned message and the prompt for ``utterance``, as bytes; RenderError if it cannot be."""
    unsure = utterance.decision in ("confirm", "reprompt")
    try:
        message = dump(render_cleaned(utterance, relay=relay, published_at=_PUBLISHED_MARK)) \
            if not unsure or forward_unsure else None
        prompt = None
        if unsure and utterance.prompt:
            prompt = dump({
                "id": utterance.id, "source": utterance.source, "speaker": utterance.speaker,
                "decision": utterance.decision, "prompt": utterance.prompt, "text": utterance.text,
                "relay": relay,
            })
    except Exception as exc:  # noqa: BLE001 - reported as one kind of failure, the original goes on
        raise RenderError(f"{type(exc).__name__}: {exc}") from exc
    return Rendered(message, prompt, _values(utterance), utterance.last_stage,
                    tuple((t.stage, t.elapsed_us) for t in utterance.trace),
                    tuple(c.stage for c in utterance.corrections), utterance.decision)


def outgoing(rendered: Rendered, topics: TopicSettings) -> list[Outgoing]:
    """The cleaned message to the output topic, published_at written in, and the prompt when the
    gate asks back."""
    out: list[Outgoing] = []
    if rendered.message is not None:
        message = rendered.message.replace(_PUBLISHED_MARK_JSON, orjson.dumps(time.time()), 1)
        out.append(Outgoing(render_topic(topics.output, rendered.values), message, topics.output_qos))
    if rendered.prompt is not None:
        out.append(Outgoing(render_topic(topics.prompt, rendered.values), rendered.prompt, topics.prompt_qos,
                            kind="prompt"))
    return out


def _values(utterance: Utterance) -> dict[str, object]:
    return {"source": utterance.source, "speaker": utterance.speaker, "decision": utterance.decision}


def is_final(utterance: Utterance) -> bool:
    """``final`` as the message validated it (pydantic also reads "false", 0, "no")."""
    raw = utterance.payload.get("final", True)
    return raw if isinstance(raw, bool) else _BOOL.validate_python(raw)


def dead_letter(topic: str, payload: bytes, error: InputError, topics: TopicSettings, *, v5: bool,
                max_bytes: int = 16_384) -> Outgoing:
    """The input, with why it was refused.

    MQTT 5 carries the reason in user properties beside the payload; 3.1.1 has no properties,
    so there the payload travels base64-encoded inside a JSON envelope. At most ``max_bytes``
    of the input travel (an oversize input must not be republished whole); ``size`` records
    the input's own size and ``truncated`` says whether it was cut. The header values come from
    untrusted input, so they are cleaned to what a broker accepts in a UTF-8 string.
    """
    kept = payload[:max_bytes]
    headers = {"reason": error.reason, "detail": clean_text(error.detail), "topic": clean_text(topic),
               "size": str(len(payload)), "truncated": "true" if len(kept) < len(payload) else "false"}
    if v5:
        return Outgoing(topics.dead_letter, kept, topics.dead_letter_qos, headers, kind="dead_letter")
    envelope = dict(headers, payload_b64=base64.b64encode(kept).decode("ascii"))
    return Outgoing(topics.dead_letter, dump(envelope), topics.dead_letter_qos, kind="dead_letter")


def partial(utterance: Utterance, payload: bytes, topics: TopicSettings) -> Outgoing:
    """A non-final result goes on untouched: the NLU side may show it, the chain adds nothing."""
    return Outgoing(render_topic(topics.output, _values(utterance)), payload, topics.output_qos)


def passthrough(utterance: Utterance, topics: TopicSettings, relay: dict[str, Any], reason: str) -> Outgoing:
    """The original, flagged with ``relay.passthrough``, when the chain did not finish."""
    message = render_passthrough(utterance, relay=relay, reason=reason)
    values = {"source": utterance.source, "speaker": utterance.speaker, "decision": None}
    return Outgoing(render_topic(topics.output, values), dump(message), topics.output_qos)
