"""What the relay publishes for one input: pure functions from a result to outgoing messages.

No network here; the service sends what these return, then acknowledges the input.
"""

from __future__ import annotations

import base64
from dataclasses import dataclass
from typing import Any

from pydantic import TypeAdapter

from relay.core.errors import InputError
from relay.core.settings import TopicSettings
from relay.core.utterance import Utterance
from relay.live.messages import dump, render_cleaned, render_passthrough
from relay.live.topics import clean_text, render_topic

__all__ = ["Outgoing", "cleaned", "dead_letter", "is_final", "partial", "passthrough"]

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


def cleaned(utterance: Utterance, topics: TopicSettings, relay: dict[str, Any]) -> list[Outgoing]:
    """The cleaned message to the output topic, and the prompt when the gate asks back."""
    values = _values(utterance)
    unsure = utterance.decision in ("confirm", "reprompt")
    out: list[Outgoing] = []
    if not unsure or topics.forward_unsure:
        message = render_cleaned(utterance, relay=relay)
        out.append(Outgoing(render_topic(topics.output, values), dump(message), topics.output_qos))
    if unsure and utterance.prompt:
        prompt = {
            "id": utterance.id, "source": utterance.source, "speaker": utterance.speaker,
            "decision": utterance.decision, "prompt": utterance.prompt, "text": utterance.text,
            "relay": relay,
        }
        out.append(Outgoing(render_topic(topics.prompt, values), dump(prompt), topics.prompt_qos, kind="prompt"))
    return out


def passthrough(utterance: Utterance, topics: TopicSettings, relay: dict[str, Any], reason: str) -> Outgoing:
    """The original, flagged with ``relay.passthrough``, when the chain did not finish."""
    message = render_passthrough(utterance, relay=relay, reason=reason)
    values = {"source": utterance.source, "speaker": utterance.speaker, "decision": None}
    return Outgoing(render_topic(topics.output, values), dump(message), topics.output_qos)
