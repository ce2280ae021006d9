"""Stage settings in groups: their dotted names, and the flat names they had before.

A stage whose settings grew into groups (``general: {min_score: 0.6}``) keeps reading the
configurations written for its flat settings. Its model derives from ``AcceptsOldNames`` and
lists each old name with the dotted place it moved to (``"min_score": "general.min_score"``);
the values are moved there before validation, so every rule of the new place applies to them.
One setting given under both names is an error, and a settings object remembers which old
names it was given, so `rehear check` can name them. No warning is raised: the old names are
a supported spelling, not a fault in the configuration.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from typing import Any, ClassVar, Self

from pydantic import BaseModel, ConfigDict, PrivateAttr, model_validator
from pydantic.fields import FieldInfo
from pydantic.functional_validators import ModelWrapValidatorHandler

__all__ = ["AcceptsOldNames", "OldNameConflict", "move_old_names", "old_names_given", "old_names_of",
           "group_model", "set_dotted", "setting_fields", "value_fields"]


class OldNameConflict(ValueError):
    """Raised when settings give one value both under its old name and under its new dotted one."""

    def __init__(self, pairs: list[tuple[str, str]]) -> None:
        self.pairs = pairs  # (old name, new dotted name), in the order of the stage's table
        super().__init__("; ".join(f"{old} is the old name of {new}: give only {new}" for old, new in pairs))


def _as_dict(value: Any) -> dict[str, Any] | None:
    """A group's values as a new dict to add to; None when it is no mapping (validation says so)."""
    if isinstance(value, BaseModel):
        return {name: getattr(value, name) for name in value.model_fields_set}
    if isinstance(value, Mapping):
        return dict(value)
    return None


def _holder(params: dict[str, Any], dotted: str) -> tuple[dict[str, Any], str] | None:
    """The dict inside ``params`` that holds ``dotted``'s last part, and that part.

    Groups on the way are copied into ``params`` (created when missing), so the caller's own
    mappings are never changed; None when one of them is not a mapping.
    """
    *groups, leaf = dotted.split(".")
    holder = params
    for group in groups:
        inner = _as_dict(holder.get(group, {}))
        if inner is None:
            return None
        holder[group] = inner
        holder = inner
    return holder, leaf


def set_dotted(params: Mapping[str, Any], dotted: str, value: Any) -> dict[str, Any]:
    """A copy of ``params`` with ``value`` at the dotted place (``general.min_score``)."""
    out = dict(params)
    place = _holder(out, dotted)
    if place is None:
        raise ValueError(f"{dotted}: {dotted.rpartition('.')[0]} is not a group of settings")
    holder, leaf = place
    holder[leaf] = value
    return out


def move_old_names(params: Mapping[str, Any], old_names: Mapping[str, str]) -> tuple[dict[str, Any], list[str]]:
    """``params`` with the value of every old name moved to its dotted place, and the old names
    that were moved. Raises OldNameConflict when a setting is given under both names."""
    out = dict(params)
    moved: list[str] = []
    conflicts: list[tuple[str, str]] = []
    for old, new in old_names.items():
        if old not in out:
            continue
        place = _holder(out, new)
        if place is None:
            continue  # the group is not a mapping: validation reports it, and the old name as unknown
        holder, leaf = place
        if leaf in holder:
            conflicts.append((old, new))
            continue
        holder[leaf] = out.pop(old)
        moved.append(old)
    if conflicts:
        raise OldNameConflict(conflicts)
    return out, moved


class AcceptsOldNames(BaseModel):
    """Base of a stage's settings that moved into groups; ``old_names`` maps each old flat
    name to its dotted place."""

    model_config = ConfigDict(extra="forbid")

    old_names: ClassVar[Mapping[str, str]] = {}
    _old_names_given: tuple[str, ...] = PrivateAttr(default=())

    # A wrap validator rather than a "before" one: it moves the old names before validation
    # like a "before" validator, and can then record on the result which ones it moved.
    @model_validator(mode="wrap")
    @classmethod
    def _accept_old_names(cls, data: Any, handler: ModelWrapValidatorHandler[Self]) -> Self:
        if not isinstance(data, Mapping) or not cls.old_names:
            return handler(data)
        moved, given = move_old_names(data, cls.old_names)
        settings = handler(moved)
        settings._old_names_given = tuple(given)
        return settings

    @property
    def old_names_given(self) -> tuple[str, ...]:
        """The old names these settings were written with, in the order of ``old_names``."""
        return self._old_names_given


def old_names_of(settings_class: type[BaseModel]) -> Mapping[str, str]:
    """Old name -> dotted new name for a stage's settings model (empty when nothing moved)."""
    return settings_class.old_names if issubclass(settings_class, AcceptsOldNames) else {}


def old_names_given(settings: object) -> tuple[str, ...]:
    """The old names a settings object was written with (none for models without old names)."""
    return settings.old_names_given if isinstance(settings, AcceptsOldNames) else ()


def group_model(annotation: object) -> type[BaseModel] | None:
    """The settings model a field holds when the field is a group of settings; None for a value."""
    return annotation if isinstance(annotation, type) and issubclass(annotation, BaseModel) else None


def setting_fields(settings_class: type[BaseModel], prefix: str = "") -> Iterator[tuple[str, FieldInfo]]:
    """Every setting by dotted name, a group's settings after the group itself."""
    for name, field in settings_class.model_fields.items():
        yield prefix + name, field
        group = group_model(field.annotation)
        if group is not None:
            yield from setting_fields(group, prefix + name + ".")


def value_fields(settings_class: type[BaseModel]) -> Iterator[tuple[str, FieldInfo]]:
    """Every setting that holds a value (not a group), by dotted name."""
    return ((name, field) for name, field in setting_fields(settings_class) if group_model(field.annotation) is None)
