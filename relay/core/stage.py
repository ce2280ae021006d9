"""The stage contract: what a stage is (the Stage protocol), what it may know (StageContext),
and the capabilities stages declare they need and provide."""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar, Protocol, runtime_checkable

from pydantic import BaseModel

from relay.core.domain import Domain, DomainFile
from relay.core.errors import ConfigError
from relay.core.utterance import Utterance

__all__ = ["CAPABILITIES", "GIVEN", "Stage", "StageContext", "check_declarations", "check_order", "deciding_stage",
           "declared", "files_used"]

# What a stage can read or produce. The message itself provides "text" (each hypothesis's words
# as received) and "message" (the recogniser's fields: payload, ranks, conf, logprob).
CAPABILITIES = frozenset({"text", "message", "tokens", "posterior", "lm_score", "entities", "corrections",
                          "decision"})
GIVEN = frozenset({"text", "message"})


@dataclass(frozen=True, slots=True)
class StageContext:
    """What a stage may know about its surroundings at construction."""

    base_dir: Path  # relative paths in stage settings resolve against this
    cache_dir: Path  # where compiled resources may be cached
    progress: bool = False  # whether slow loads may draw a progress bar
    domain: Domain = Domain()  # the files of the configuration's domain: section

    def resolve(self, path: Path) -> Path:
        """A path from stage settings: ``~`` expanded, relative ones taken from ``base_dir``."""
        path = path.expanduser()
        return path if path.is_absolute() else self.base_dir / path

    def domain_file(self, role: DomainFile, override: Path | None) -> Path | None:
        """The stage's own setting when given, else the domain's file for ``role`` (either may be None)."""
        return self.resolve(override) if override is not None else getattr(self.domain, role)

    def require_file(self, role: DomainFile, override: Path | None, *, stage: str, setting: str) -> Path:
        """As ``domain_file``, but a ConfigError naming both places when neither gives the file."""
        if override is not None:
            return self.resolve(override)
        return self.domain.require(role, stage=stage, setting=setting)


@runtime_checkable
class Stage(Protocol):
    """A step of the chain.

    ``Settings`` is a pydantic model (extra keys forbidden) the YAML parameters validate
    against. ``needs`` are capabilities an earlier stage must provide; ``provides`` what this
    stage writes. A stage may also declare ``uses``: capabilities it reads when an earlier stage
    provides them and does without otherwise (the gate reads entities when a lexicon ran).
    ``load`` reads models and lexicons; it may be slow and runs again on reload. ``process`` is
    fast, pure and synchronous.
    """

    name: ClassVar[str]
    Settings: ClassVar[type[BaseModel]]
    needs: ClassVar[frozenset[str]]
    provides: ClassVar[frozenset[str]]

    def __init__(self, settings: Any, *, context: StageContext) -> None: ...

    def load(self) -> None: ...

    def process(self, utterance: Utterance) -> Utterance: ...


def files_used(stage: object) -> dict[str, Path]:
    """The files a constructed stage will read, by role ("lexicon", "language model", ...).

    A stage lists them in an optional ``files`` mapping (None for a role it leaves unused), so
    `rehear check` can show where each file comes from and find missing ones without loading.
    """
    files = getattr(stage, "files", None) or {}
    return {role: path for role, path in files.items() if path is not None}


def declared(stage: Stage | type[Stage]) -> dict[str, frozenset[str]]:
    """A stage's declared capabilities: ``needs``, ``uses`` (optional reads) and ``provides``."""
    return {"needs": frozenset(stage.needs), "uses": frozenset(getattr(stage, "uses", frozenset())),
            "provides": frozenset(stage.provides)}


def check_declarations(stage: Stage | type[Stage]) -> list[str]:
    """One problem per declared capability that does not exist (a typo in ``provides`` would
    otherwise pass silently and break the order check of every later stage)."""
    problems = []
    for kind, names in declared(stage).items():
        for unknown in sorted(names - CAPABILITIES):
            problems.append(f"{kind} {unknown!r} is not a capability (valid: {', '.join(sorted(CAPABILITIES))})")
    return problems


def deciding_stage(stages: Iterable[Stage]) -> Stage | None:
    """The last stage that provides "decision": the gate, whatever its class."""
    found = None
    for stage in stages:
        if "decision" in stage.provides:
            found = stage
    return found


def check_order(stages: Iterable[Stage], *, location: Callable[[int], str] | None = None) -> None:
    """Raise ConfigError when a stage declares an unknown capability or needs something no
    earlier stage provides."""
    available = set(GIVEN)
    problems = []
    for index, stage in enumerate(stages):
        where = location(index) if location else f"stages[{index}] ({stage.name})"
        problems += [f"{where}: {problem}" for problem in check_declarations(stage)]
        missing = sorted(stage.needs - available)
        if missing:
            problems.append(
                f"{where}: needs {', '.join(missing)}, which no earlier stage provides"
                f" (available: {', '.join(sorted(available))})"
            )
        available |= stage.provides
    if problems:
        raise ConfigError("The stage chain is out of order", problems)
