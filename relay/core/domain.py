"""The domain's files, named once in the configuration's ``domain:`` section.

A chain reads the same few files in several stages: the lexicon (matched by `lexicon`, and the
names the gate's carrier phrases know), the in-domain text (the language model's source, the
carrier phrases of `lexicon` and `gate`), the language model (`lm_rescore`, the context term
of `lexicon`, the gate's judgement of the finished text) and the speakers' priors. Each is
given once here; a stage takes it from the context unless its own settings name another file.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from relay.core.errors import ConfigError

__all__ = ["Domain", "DomainFile", "DomainSettings"]

DomainFile = Literal["lexicon", "text", "language_model", "speakers"]


class DomainSettings(BaseModel):
    """The ``domain:`` section as written; relative paths resolve against the configuration file."""

    model_config = ConfigDict(extra="forbid")

    lexicon: Path | None = Field(None, description="lexicon CSV/YAML/JSON (docs/formats.md section 3)")
    text: Path | None = Field(None, description="in-domain text with {type} slots (docs/formats.md section 4)")
    language_model: Path | None = Field(None, description="ARPA or kenlm binary model (rehear build-lm)")
    speakers: Path | None = Field(None, description="speaker,id,affinity CSV: personal priors")


@dataclass(frozen=True, slots=True)
class Domain:
    """The domain's files as absolute paths; None where the configuration names none."""

    lexicon: Path | None = None
    text: Path | None = None
    language_model: Path | None = None
    speakers: Path | None = None

    @classmethod
    def from_settings(cls, settings: DomainSettings, base_dir: Path) -> Domain:
        def resolve(path: Path | None) -> Path | None:
            if path is None:
                return None
            path = path.expanduser()
            return path if path.is_absolute() else base_dir / path

        return cls(**{f.name: resolve(getattr(settings, f.name)) for f in fields(cls)})

    def require(self, role: DomainFile, *, stage: str, setting: str) -> Path:
        """The file for ``role``; a ConfigError naming both places it could be given when neither is."""
        path: Path | None = getattr(self, role)
        if path is None:
            raise ConfigError(f"stage {stage} needs a {role.replace('_', ' ')} file",
                              [f"set domain.{role}, or {setting} in the stage's settings"])
        return path
