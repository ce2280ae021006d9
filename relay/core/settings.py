"""The relay's own settings sections: broker, topics, limits, metrics, logging."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, SecretStr, field_validator, model_validator

__all__ = ["BrokerSettings", "CaptureSettings", "LimitSettings", "LogSettings", "MetricsSettings", "Qos", "TlsSettings", "TopicSettings",
           "source_level_of", "unshared"]

Qos = Literal[0, 1, 2]
_TEMPLATE_FIELDS = ("source", "speaker", "decision")
_PLACEHOLDER = re.compile(r"\{([^{}]*)\}")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class TlsSettings(_Strict):
    """TLS to the broker; off unless ``enabled`` (or any file is given)."""

    enabled: bool = False
    ca_file: Path | None = Field(None, description="CA certificates that signed the broker's certificate; "
                                 "default: the system's trust store")
    cert_file: Path | None = Field(None, description="client certificate, for brokers that require one")
    key_file: Path | None = Field(None, description="the client certificate's private key")
    check_hostname: bool = Field(True, description="the broker's certificate must name broker.host")
    min_version: Literal["1.2", "1.3"] = "1.2"
    max_version: Literal["1.2", "1.3"] | None = None

    @model_validator(mode="after")
    def _consistent(self) -> TlsSettings:
        if self.ca_file or self.cert_file or self.key_file:
            self.enabled = True
        if (self.cert_file is None) != (self.key_file is None):
            raise ValueError("cert_file and key_file go together")
        if self.max_version is not None and float(self.max_version) < float(self.min_version):
            raise ValueError(f"max_version {self.max_version} is below min_version {self.min_version}")
        return self

    @field_validator("min_version", "max_version", mode="before")
    @classmethod
    def _version_as_text(cls, value: Any) -> Any:
        return f"{value:.1f}" if isinstance(value, float) else value


class BrokerSettings(_Strict):
    host: str = "127.0.0.1"
    port: int = Field(1883, ge=1, le=65535)
    protocol: Literal["5", "3.1.1"] = "5"
    client_id: str = Field("rehear", min_length=1, max_length=64)
    username: str | None = None
    password: SecretStr | None = None
    password_file: Path | None = Field(None, description="read the password from this file (first line); "
                                       "for an environment variable write password: ${NAME}")
    keepalive_s: int = Field(30, ge=5, le=3600)
    session_expiry_s: int = Field(3600, ge=0, description="how long the broker keeps queued input while the relay is away")
    tcp_nodelay: bool = True
    reconnect_min_s: float = Field(0.5, gt=0)
    reconnect_max_s: float = Field(30.0, gt=0)
    tls: TlsSettings = TlsSettings()

    @model_validator(mode="after")
    def _one_password(self) -> BrokerSettings:
        if self.password is not None and self.password_file is not None:
            raise ValueError("give password or password_file, not both")
        return self

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
    source_level: int | Literal["auto", "none"] = Field(
        "auto",
        description="which level of the input topic names the source (0 = first): a recogniser may then only "
        "write into its own device's topics. auto: the first + of the input filter that matched, none: "
        "the payload's source",
    )
    source_mismatch: Literal["refuse", "ignore"] = Field(
        "refuse", description="a payload source that disagrees with the topic: refuse (dead letter) or "
        "ignore (the topic's source is used)",
    )

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

    @field_validator("source_level")
    @classmethod
    def _level(cls, value: int | str) -> int | str:
        if isinstance(value, int) and value < 0:
            raise ValueError("a topic level counts from 0")
        return value


def unshared(topic_filter: str) -> str:
    """``topic_filter`` without a leading ``$share/GROUP/``: that part is the broker's, not part
    of the topics that arrive."""
    levels = topic_filter.split("/", 2)
    return levels[2] if levels[0] == "$share" and len(levels) > 2 else topic_filter


def source_level_of(topic_filter: str, setting: int | str) -> int | None:
    """The level of topics matching ``topic_filter`` that names the source, or None (a shared
    subscription's ``$share/GROUP/`` is not counted: see ``unshared``)."""
    if setting == "none":
        return None
    levels = unshared(topic_filter).split("/")
    if isinstance(setting, int):
        return setting
    return levels.index("+") if "+" in levels else None


class LimitSettings(_Strict):
    max_payload_bytes: int = Field(262_144, ge=256)
    max_hypotheses: int = Field(50, ge=1, le=50)
    max_words_per_hypothesis: int = Field(
        60, ge=1, description="more words in one hypothesis: the original goes on uncleaned, flagged too_long")
    max_words: int = Field(
        300, ge=1, description="more words over all hypotheses: the original goes on uncleaned, flagged too_long")
    max_word_chars: int = Field(
        40, ge=1, description="a longer word (no spaces) counts as one word per this many characters")
    dead_letter_max_bytes: int = Field(
        16_384, ge=0, description="dead letters carry at most this much of the input; the original size is recorded")
    publish_attempts: int = Field(
        4, ge=1, le=20, description="tries for a publish the broker refuses (MQTT 5 reason code), with backoff, "
        "before the input is left unacknowledged for redelivery")
    stall_s: float = Field(
        30.0, gt=0, description="/healthz turns 503 when the oldest unacknowledged input is older than this")
    max_in_flight: int = Field(64, ge=1, le=10_000)
    deadline_ms: float = Field(250.0, gt=0)
    drain_s: float = Field(10.0, ge=0, description="on shutdown, how long in-flight messages may take to finish")
    chain_runner: Literal["thread", "loop", "process"] = Field(
        "thread",
        description="thread: stages run on one worker thread, so a slow stage cannot stall the broker "
        "connection and the deadline is enforced even mid-stage; loop: on the event loop, "
        "deadline checked between stages only (no cheaper: measured in relay/live/README.md); "
        "process: in worker processes forked with the loaded chain, every core used",
    )
    chain_processes: int | None = Field(
        None, ge=1, le=64, description="worker processes of chain_runner process; default one per core")


class MetricsSettings(_Strict):
    enabled: bool = True
    host: str = "127.0.0.1"
    port: int = Field(9464, ge=0, le=65535)


class CaptureSettings(_Strict):
    """What the relay receives and sends, recorded for `rehear label`; off by default."""

    enabled: bool = Field(False, description="record every input and what was published for it")
    directory: Path = Field(Path("capture"), description="where the JSON Lines files go (relative to the "
                            "configuration file)")
    max_file_bytes: int = Field(8 * 1024 * 1024, ge=4096, description="a new file is begun past this size")
    max_files: int = Field(8, ge=1, le=10_000, description="the oldest file is removed past this many")
    queue: int = Field(10_000, ge=1, description="records waiting for the writer thread; past this they are "
                       "dropped and counted (rehear_capture_dropped_total), never delaying a message")


class LogSettings(_Strict):
    format: Literal["plain", "json"] = "plain"
    level: Literal["debug", "info", "warning", "error"] = "info"
