"""The relay's own settings sections: broker, topics, limits, metrics, logging."""

from __future__ import annotations

import re
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, SecretStr, field_validator

__all__ = ["BrokerSettings", "LimitSettings", "LogSettings", "MetricsSettings", "Qos", "TopicSettings"]

Qos = Literal[0, 1, 2]
_TEMPLATE_FIELDS = ("source", "speaker", "decision")
_PLACEHOLDER = re.compile(r"\{([^{}]*)\}")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class BrokerSettings(_Strict):
    host: str = "127.0.0.1"
    port: int = Field(1883, ge=1, le=65535)
    protocol: Literal["5", "3.1.1"] = "5"
    client_id: str = Field("rehear", min_length=1, max_length=64)
    username: str | None = None
    password: SecretStr | None = None
    keepalive_s: int = Field(30, ge=5, le=3600)
    session_expiry_s: int = Field(3600, ge=0, description="how long the broker keeps queued input while the relay is away")
    tcp_nodelay: bool = True
    reconnect_min_s: float = Field(0.5, gt=0)
    reconnect_max_s: float = Field(30.0, gt=0)

    @field_validator("protocol", mode="before")
    @classmethod
    def _protocol_as_text(cls, value: Any) -> Any:
        return str(value) if isinstance(value, (int, float)) else value


def _check_template(template: str) -> str:
    for name in _PLACEHOLDER.findall(template):
        if name not in _TEMPLATE_FIELDS:
            raise ValueError(f"unknown placeholder {{{name}}} (allowed: {', '.join('{' + f + '}' for f in _TEMPLATE_FIELDS)})")
    if "+" in template or "#" in template:
        raise ValueError("a publish topic may not contain the wildcards + or #")
    if not template or template.startswith("/") or "//" in template:
        raise ValueError("a publish topic may not be empty or hold an empty level")
    return template


class TopicSettings(_Strict):
    inputs: list[str] = Field(default_factory=lambda: ["asr/+/nbest"], min_length=1)
    output: str = "nlu/{source}/in"
    prompt: str = "dialogue/{source}/prompt"
    dead_letter: str = "rehear/dead-letter"
    input_qos: Qos = 1
    output_qos: Qos = 1
    prompt_qos: Qos = 1
    dead_letter_qos: Qos = 1
    forward_unsure: bool = Field(True, description="send confirm/reprompt results to the output topic too")

    _templates = field_validator("output", "prompt", "dead_letter")(_check_template)

    @field_validator("inputs")
    @classmethod
    def _filters(cls, value: list[str]) -> list[str]:
        for topic in value:
            levels = topic.split("/")
            if not topic or any(("#" in lvl and lvl != "#") or ("+" in lvl and lvl != "+") for lvl in levels):
                raise ValueError(f"{topic!r} is not a valid topic filter")
            if "#" in levels[:-1]:
                raise ValueError(f"{topic!r}: # may only be the last level")
        return value


class LimitSettings(_Strict):
    max_payload_bytes: int = Field(262_144, ge=256)
    max_hypotheses: int = Field(50, ge=1, le=50)
    max_in_flight: int = Field(64, ge=1, le=10_000)
    deadline_ms: float = Field(250.0, gt=0)
    drain_s: float = Field(10.0, ge=0, description="on shutdown, how long in-flight messages may take to finish")
    chain_runner: Literal["thread", "loop"] = Field(
        "thread",
        description="thread: stages run on one worker thread, so a slow stage cannot stall the broker "
        "connection and the deadline is enforced even mid-stage; loop: on the event loop, "
        "deadline checked between stages only (no cheaper: measured in relay/live/README.md)",
    )


class MetricsSettings(_Strict):
    enabled: bool = True
    host: str = "127.0.0.1"
    port: int = Field(9464, ge=0, le=65535)


class LogSettings(_Strict):
    format: Literal["plain", "json"] = "plain"
    level: Literal["debug", "info", "warning", "error"] = "info"
