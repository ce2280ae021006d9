"""Adapts recognisers that send another message shape, by configuration instead of code.

Each canonical field names where to find it: a dotted path (``result.alternatives``) or a
JSON pointer (``/result/alternatives``). ``text``, ``conf`` and ``logprob`` are read relative to
each item of the ``nbest`` list.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict

from relay.core.errors import InputError

__all__ = ["FieldMap"]

_MISSING = object()


def _split(path: str) -> tuple[str, ...]:
    if path.startswith("/"):
        return tuple(part.replace("~1", "/").replace("~0", "~") for part in path[1:].split("/"))
    return tuple(path.split("."))


def _lookup(data: Any, parts: tuple[str, ...]) -> Any:
    for part in parts:
        if isinstance(data, dict):
            data = data.get(part, _MISSING)
        elif isinstance(data, list) and part.isdigit() and int(part) < len(data):
            data = data[int(part)]
        else:
            return _MISSING
        if data is _MISSING:
            return _MISSING
    return data


class FieldMap(BaseModel):
    """Where each field of docs/formats.md section 1 sits in the recogniser's own message."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    id: str = "id"
    source: str = "source"
    speaker: str = "speaker"
    final: str = "final"
    nbest: str = "nbest"
    text: str = "text"
    conf: str = "conf"
    logprob: str = "logprob"

    @property
    def is_identity(self) -> bool:
        return self == _IDENTITY

    def apply(self, data: dict[str, Any], *, topic: str) -> dict[str, Any]:
        """Return the message in the canonical shape; the original fields are kept beside it."""
        out = dict(data)
        for name in ("id", "source", "speaker", "final"):
            value = _lookup(data, _split(getattr(self, name)))
            if value is not _MISSING:
                out[name] = value
        items = _lookup(data, _split(self.nbest))
        if items is _MISSING:
            return out  # validation reports the missing nbest with the canonical name
        if not isinstance(items, list):
            raise InputError("schema", f"topic {topic}: field {self.nbest} (nbest): expected a list")
        nbest = []
        for index, item in enumerate(items):
            if isinstance(item, str):  # some recognisers send bare strings
                nbest.append({"text": item})
                continue
            if not isinstance(item, dict):
                raise InputError("schema", f"topic {topic}: field {self.nbest}[{index}]: expected an object")
            entry = dict(item)
            for name in ("text", "conf", "logprob"):
                value = _lookup(item, _split(getattr(self, name)))
                if value is not _MISSING:
                    entry[name] = value
            nbest.append(entry)
        out["nbest"] = nbest
        return out


_IDENTITY = FieldMap()
