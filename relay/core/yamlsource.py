"""YAML read with the line of every value, and ``${ENV_VAR}`` interpolation.

Configuration errors must name the line; PyYAML's composed node tree carries the marks,
so values are built from nodes here and each path is mapped to its 1-based line.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from relay.core.errors import ConfigError

__all__ = ["Located", "load_yaml"]

Path_ = tuple[str | int, ...]
_ENV = re.compile(r"\$\{([A-Za-z_][A-Za-z0-9_]*)(?::-([^}]*))?\}")


@dataclass
class Located:
    """A YAML document's value with the line of each path in it."""

    file: str
    value: Any
    lines: dict[Path_, int] = field(default_factory=dict)
    # The document as read (${VARIABLES} unexpanded), for whoever needs the file itself without
    # reading it again; None for a value that came from no file.
    text: str | None = field(default=None, repr=False)

    def line(self, path: Path_) -> int | None:
        """The line of the deepest known prefix of ``path``."""
        for end in range(len(path), -1, -1):
            found = self.lines.get(tuple(path[:end]))
            if found is not None:
                return found
        return None

    def where(self, path: Path_) -> str:
        line = self.line(path)
        return f"{self.file}:{line}" if line is not None else self.file


def _interpolate(text: str, env: Mapping[str, str], *, file: str, line: int) -> str:
    def replace(match: re.Match[str]) -> str:
        name, default = match.group(1), match.group(2)
        if name in env:
            return env[name]
        if default is not None:
            return default
        raise ConfigError(f"{file}:{line}: environment variable {name} is not set",
                          ["set it, or give a default as ${" + name + ":-value}"])

    return _ENV.sub(replace, text)


def _build(node: yaml.Node, loader: yaml.SafeLoader, path: Path_, out: Located, env: Mapping[str, str]) -> Any:
    out.lines[path] = node.start_mark.line + 1
    if isinstance(node, yaml.MappingNode):
        result: dict[Any, Any] = {}
        for key_node, value_node in node.value:
            key = loader.construct_object(key_node)
            if key in result:
                raise ConfigError(f"{out.file}:{key_node.start_mark.line + 1}: key {key!r} appears twice")
            result[key] = _build(value_node, loader, path + (str(key),), out, env)
        return result
    if isinstance(node, yaml.SequenceNode):
        return [_build(item, loader, path + (index,), out, env) for index, item in enumerate(node.value)]
    value = loader.construct_object(node)
    if isinstance(value, str) and "${" in value:
        value = _interpolate(value, env, file=out.file, line=node.start_mark.line + 1)
        if node.tag == "tag:yaml.org,2002:str" and getattr(node, "style", None) is None:
            # An unquoted ${PORT} should still become a number or a boolean.
            value = yaml.safe_load(value) if value.strip() else value
    return value


def load_yaml(path: Path, *, env: Mapping[str, str] | None = None, text: str | None = None) -> Located:
    """Read a YAML file into plain values with a line for every path."""
    name = str(path)
    if text is None:
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise ConfigError(f"{name}: no such file") from None
        except UnicodeDecodeError as exc:
            raise ConfigError(f"{name}: not UTF-8 text (byte {exc.start})") from None
    loader = yaml.SafeLoader(text)
    try:
        node = loader.get_single_node()
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"{name}:{mark.line + 1}" if mark is not None else name
        detail = str(getattr(exc, "problem", None) or exc)
        context, context_mark = getattr(exc, "context", None), getattr(exc, "context_mark", None)
        if context and context_mark is not None:
            detail += f" ({context} started at line {context_mark.line + 1})"
        raise ConfigError(f"{where}: not valid YAML", [detail]) from None
    finally:
        loader.dispose()
    out = Located(file=name, value=None, text=text)
    out.value = {} if node is None else _build(node, loader, (), out, os.environ if env is None else env)
    return out
