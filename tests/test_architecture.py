"""The layout shows the architecture: imports flow one way and modules stay small.

relay.core is what stages import (the utterance, the stage contract, errors, registry,
configuration); relay.live runs the relay; relay.workbench holds the offline tools; relay.cli
parses arguments. Stages import nothing of relay but relay.core, and relay.core nothing of
stages: the registry names built-in stages as strings and imports them on first use.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from tests.paths import ROOT

# package prefix -> relay packages it must not import
FORBIDDEN = {
    "stages": ("relay.live", "relay.workbench", "relay.cli"),
    "relay.core": ("stages", "relay.live", "relay.workbench", "relay.cli"),
    "relay.live": ("relay.workbench", "relay.cli"),
    "relay.workbench": ("relay.cli",),
}
MAX_LINES = 400


def _modules() -> list[tuple[str, Path]]:
    found = []
    for top in ("relay", "stages"):
        for path in sorted((ROOT / top).rglob("*.py")):
            parts = path.relative_to(ROOT).with_suffix("").parts
            found.append((".".join(p for p in parts if p != "__init__"), path))
    return found


def _imports(path: Path) -> set[str]:
    names = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def _within(name: str, package: str) -> bool:
    return name == package or name.startswith(package + ".")


def test_imports_flow_one_way() -> None:
    modules = _modules()
    assert len(modules) > 50, "the import check found too few modules to mean anything"
    problems = []
    for module, path in modules:
        for package, forbidden in FORBIDDEN.items():
            if not _within(module, package):
                continue
            for name in sorted(_imports(path)):
                if any(_within(name, f) for f in forbidden):
                    problems.append(f"{module} imports {name}")
    assert not problems, "\n".join(problems)


def test_stages_import_only_the_core_of_relay() -> None:
    for module, path in _modules():
        if _within(module, "stages"):
            outside = [n for n in _imports(path) if _within(n, "relay") and not _within(n, "relay.core")]
            assert not outside, f"{module} imports {outside}"


@pytest.mark.parametrize("top", ["relay", "stages"])
def test_every_module_stays_under_the_size_limit(top: str) -> None:
    sizes = {path.relative_to(ROOT): len(path.read_text(encoding="utf-8").splitlines())
             for path in (ROOT / top).rglob("*.py")}
    assert sizes
    too_long = {str(p): n for p, n in sizes.items() if n >= MAX_LINES}
    assert not too_long, f"modules of {MAX_LINES} lines or more: {too_long}"
