"""Files the workbench writes for people and other machines: configurations that keep their
comments and travel (paths relative to the written file); written with the process umask and
atomically by relay.core.files."""

from __future__ import annotations

import io
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ruamel.yaml import YAML
from ruamel.yaml.comments import CommentedMap

from relay.core.errors import ConfigError
from relay.core.files import apply_umask, write_atomically

__all__ = ["apply_umask", "dump_yaml", "load_commented", "merge_in_place", "rebase_paths", "write_atomically"]

_HEADER_MARK = "# rehear tune on "


def _yaml() -> YAML:
    yaml = YAML()  # round-trip: comments, key order and quoting survive
    yaml.preserve_quotes = True
    yaml.width = 110
    yaml.indent(mapping=2, sequence=4, offset=2)
    return yaml


def load_commented(path: Path, *, text: str | None = None) -> Any:
    """A YAML file as ruamel's round-trip tree (comments kept; ${VARIABLES} left as written).

    ``text``: the file's text when it was read already (``path`` then only names it).
    """
    try:
        return _yaml().load(path.read_text(encoding="utf-8") if text is None else text)
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: cannot read ({exc})") from None
    except Exception as exc:  # noqa: BLE001 - ruamel's errors have no common base worth naming
        raise ConfigError(f"{path}: not valid YAML ({type(exc).__name__})") from None


def dump_yaml(document: Any, *, header: str = "") -> str:
    """The document as YAML text, ``header`` (comment lines) first; an earlier tune header is replaced."""
    buffer = io.StringIO()
    _yaml().dump(document, buffer)
    text = buffer.getvalue()
    lines = text.splitlines(keepends=True)
    while lines and lines[0].startswith(_HEADER_MARK):
        lines.pop(0)
    return header + "".join(lines)


def merge_in_place(target: Any, new: Mapping[str, Any]) -> Any:
    """``target`` (a mapping from the round-trip tree, or None) changed to equal ``new``, keeping
    the comments and order of the keys it keeps; returns the mapping to store."""
    if not isinstance(target, dict):
        return CommentedMap(new) if new else target
    for key in [k for k in target if k not in new]:
        del target[key]  # e.g. an old setting name, now written at its new place
    for key, value in new.items():
        if isinstance(value, Mapping) and isinstance(target.get(key), dict):
            merge_in_place(target[key], value)
        elif target.get(key) != value or key not in target:
            target[key] = value
    return target


def _rebased(value: str, base_dir: Path, out_dir: Path, *, must_exist: bool, absolute: bool = False) -> str:
    path = Path(value).expanduser()
    if "${" in value or (path.is_absolute() and not absolute):
        return value  # read from the environment, or written absolute on purpose
    full = base_dir / path
    if must_exist and not full.is_file():
        return value
    return os.path.relpath(full.resolve(), out_dir.resolve())


def rebase_paths(document: Any, *, base_dir: Path, out_dir: Path, absolute: bool = False) -> None:
    """Relative file paths in ``document`` (read against ``base_dir``) rewritten relative to
    ``out_dir``, in place: the domain's files, the cache and any stage setting naming a file.
    ``absolute``: absolute paths too (ones rehear made, not ones a person wrote)."""
    if not isinstance(document, dict):
        return
    if "cache_dir" in document or base_dir.resolve() != out_dir.resolve():
        document["cache_dir"] = _rebased(str(document.get("cache_dir", ".rehear-cache")), base_dir, out_dir,
                                         must_exist=False, absolute=absolute)
    domain = document.get("domain")
    if isinstance(domain, dict):
        for key, value in domain.items():
            if isinstance(value, str):
                domain[key] = _rebased(value, base_dir, out_dir, must_exist=False, absolute=absolute)

    def walk(params: Any) -> None:
        if isinstance(params, dict):
            for key, value in params.items():
                if isinstance(value, str):
                    params[key] = _rebased(value, base_dir, out_dir, must_exist=True, absolute=absolute)
                else:
                    walk(value)

    for item in document.get("stages") or []:
        if isinstance(item, dict):
            for params in item.values():
                walk(params)
