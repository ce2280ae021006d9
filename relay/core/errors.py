"""The project's error hierarchy. Every error a user can see derives from RehearError."""

from __future__ import annotations

from typing import ClassVar

__all__ = ["ConfigError", "DeadlineExceeded", "InputError", "PublishRefused", "RehearError", "StageError",
           "TransportError", "WorkFailed"]


class RehearError(Exception):
    """Raised for any problem rehear reports to its user; the base of all others.

    ``exit_status`` is what a command exits with when this error ends it: 2 for bad input
    (arguments, configuration, data files), 1 for work that failed on good input.
    """

    exit_status: ClassVar[int] = 2


class ConfigError(RehearError):
    """Raised when a configuration file, or a file it names, is invalid.

    ``problems`` holds one line per problem, each starting with its location
    (``relay.yaml:14 stages[1] (lexicon) -> max_span_words: ...``).
    """

    def __init__(self, title: str, problems: list[str] | None = None) -> None:
        self.title = title
        self.problems = list(problems or [])
        super().__init__(self.__str__())

    def __str__(self) -> str:
        if not self.problems:
            return self.title
        return self.title + "\n" + "\n".join(f"  {line}" for line in self.problems)


class InputError(RehearError):
    """Raised when an incoming message or data file is malformed.

    ``reason`` is a short, bounded label (``invalid_json``, ``schema``, ``oversize``,
    ``not_utf8``, ``too_many_hypotheses``) used as a metric label and dead-letter header;
    ``detail`` says which field or line is wrong.
    """

    def __init__(self, reason: str, detail: str) -> None:
        self.reason = reason
        self.detail = detail
        super().__init__(f"{reason}: {detail}")


class StageError(RehearError):
    """Raised when a stage cannot load its resources or fails on a message."""

    def __init__(self, stage: str, detail: str) -> None:
        self.stage = stage
        self.detail = detail
        super().__init__(f"stage {stage}: {detail}")


class TransportError(RehearError):
    """Raised when the broker connection cannot be set up as configured, or breaks.

    ``kind`` is a short, bounded label (``network``, ``tls``, ``refused``, ``publish``) used as a
    metric label.
    """

    exit_status: ClassVar[int] = 1

    def __init__(self, message: str, *, kind: str = "network") -> None:
        self.kind = kind
        super().__init__(message)


class PublishRefused(TransportError):
    """Raised when the broker answers a publish with a failure reason code (MQTT 5 PUBACK >= 0x80).

    ``code`` is the reason code (0x87: not authorised), ``reason`` its name from the specification.
    """

    def __init__(self, topic: str, code: int, reason: str) -> None:
        self.topic = topic
        self.code = code
        self.reason = reason
        super().__init__(f"broker refused the publish on {topic!r}: reason code {code:#04x} ({reason})",
                         kind="publish")


class DeadlineExceeded(RehearError):
    """Raised between stages, or inside one that checks, when a message has used up its deadline."""

    exit_status: ClassVar[int] = 1

    def __init__(self, stage: str, elapsed_ms: float, *, inside: bool = False) -> None:
        self.stage = stage
        self.elapsed_ms = elapsed_ms
        where = "inside" if inside else "before"
        super().__init__(f"deadline passed {where} stage {stage} ({elapsed_ms:.1f} ms spent)")


class WorkFailed(RehearError):
    """Raised when a command's work fails on good input (a port taken, a result that never came)."""

    exit_status: ClassVar[int] = 1
