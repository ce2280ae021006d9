"""The project's error hierarchy. Every error a user can see derives from RehearError."""

from __future__ import annotations

__all__ = ["ConfigError", "DeadlineExceeded", "InputError", "RehearError", "StageError", "TransportError"]


class RehearError(Exception):
    """Raised for any problem rehear reports to its user; the base of all others."""


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
    """Raised when the broker connection cannot be set up as configured."""


class DeadlineExceeded(RehearError):
    """Raised between stages when a message has used up its processing deadline."""

    def __init__(self, stage: str, elapsed_ms: float) -> None:
        self.stage = stage
        self.elapsed_ms = elapsed_ms
        super().__init__(f"deadline passed before stage {stage} ({elapsed_ms:.1f} ms spent)")
