"""Structured logs: one line per event, plain text for people or JSON for collectors.

Call sites pass fields as ``extra={"fields": {...}}``; both formats show them.
"""

from __future__ import annotations

import logging
import sys
import time
from typing import Any, Literal, TextIO

import orjson

__all__ = ["JsonFormatter", "PlainFormatter", "setup_logging"]

_LEVELS = {"debug": logging.DEBUG, "info": logging.INFO, "warning": logging.WARNING, "error": logging.ERROR}


def _fields(record: logging.LogRecord) -> dict[str, Any]:
    fields = getattr(record, "fields", None)
    return dict(fields) if isinstance(fields, dict) else {}


class JsonFormatter(logging.Formatter):
    """One JSON object per line: ts, level, logger, msg and the event's fields."""

    def format(self, record: logging.LogRecord) -> str:
        event: dict[str, Any] = {
            "ts": round(record.created, 6),
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": record.getMessage(),
        }
        for key, value in _fields(record).items():
            event.setdefault(key, value)
        if record.exc_info:
            event["exc"] = self.formatException(record.exc_info)
        return orjson.dumps(event, default=str).decode()


class PlainFormatter(logging.Formatter):
    """``2025-01-01T12:00:00.123 INFO  rehear.service: message key=value ...``"""

    def format(self, record: logging.LogRecord) -> str:
        stamp = time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(record.created))
        line = f"{stamp}.{int(record.msecs):03d} {record.levelname:<7} {record.name}: {record.getMessage()}"
        extra = " ".join(f"{key}={value}" for key, value in _fields(record).items())
        if extra:
            line += " " + extra
        if record.exc_info:
            line += "\n" + self.formatException(record.exc_info)
        return line


def setup_logging(
    format: Literal["plain", "json"] = "plain",
    level: Literal["debug", "info", "warning", "error"] = "info",
    *,
    stream: TextIO | None = None,
) -> logging.Logger:
    """Configure the ``rehear`` logger tree (not the root logger) and return its root."""
    logger = logging.getLogger("rehear")
    for handler in list(logger.handlers):
        logger.removeHandler(handler)
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonFormatter() if format == "json" else PlainFormatter())
    logger.addHandler(handler)
    logger.setLevel(_LEVELS[level])
    logger.propagate = False
    return logger
