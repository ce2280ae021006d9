"""The lexicon stage's grouped settings, and the flat names of earlier configurations."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from pydantic import BaseModel, ValidationError
from pydantic.fields import FieldInfo

from relay.core.setting_names import setting_fields, value_fields
from stages.lexicon.settings import OLD_NAMES, LexiconSettings

# The settings that kept their place at the top when the rest moved into groups.
UNMOVED = {"lexicon", "speakers", "max_span_words", "trace_top"}
# Settings added after the groups, which no flat name ever meant.
ADDED = {"match.broad_candidates", "match.broad_min_retrieval", "match.costs", "derive.hint_count",
         "derive.hint_share", "derive.anchor_count", "derive.anchor_share", "general.heard_weight",
         "general.min_support", "general.kept_min_phone", "carrier.heard_weight", "carrier.min_gain",
         "match.skeleton_candidates", "match.skeleton_min_retrieval", "general.heard_short_penalty",
         "general.heard_sureness", "general.heard_weight_probs", "match.realign_slack"}

# The lexicon stage of examples/workshop/relay.yaml as it was written before the groups.
WORKSHOP_FLAT = {
    "type_hints": {"person": ["call", "page", "ask", "tell", "find", "message", "for", "with", "is", "remind",
                              "let", "give", "get", "show", "buzz", "has", "does", "can", "seen", "grab",
                              "put", "to"]},
    "slot_types": ["person", "machine"],
    "slot_hints": {"machine": ["the", "in", "on", "of"]},
    "slot_floors": {"machine": 0.72},
    "min_score": 0.6,
    "lm_weight": 0.0,
    "lm_loss_weight": 0.06,
    "short_penalty": 0.3,
    "slot_min_phone": 0.68,
    "slot_min_gain": 8.0,
    "slot_min_pooled": 0.0,
}


def leaves() -> dict[str, FieldInfo]:
    """Every setting that holds a value (not a group), by dotted name."""
    return dict(value_fields(LexiconSettings))


def at(settings: BaseModel, dotted: str) -> Any:
    value: Any = settings
    for part in dotted.split("."):
        value = getattr(value, part)
    return value


def sample(name: str, field: FieldInfo) -> Any:
    """A valid value for ``field`` that differs from its default."""
    default = field.get_default(call_default_factory=True)
    annotation = field.annotation
    if annotation is bool:
        return not default
    if annotation in (int, float, int | None):
        low = next((m.ge for m in field.metadata if hasattr(m, "ge")), 0)
        high = next((m.le for m in field.metadata if hasattr(m, "le")), 100)
        value = (low + high) / 2 if annotation is float else (low + high) // 2
        return value if value != default else value + (1 if annotation is not float else 0.01)
    if annotation == Path | None:
        return Path(f"{name}.file")
    if annotation == list[str]:
        return ["person"]
    if annotation in (dict[str, list[str]], dict[str, list[str]] | None):
        return {"person": ["call"]}
    if annotation == dict[str, float]:
        return {"machine": 0.7}
    raise AssertionError(f"{name}: no sample for {annotation}")


def test_every_setting_either_stayed_at_the_top_or_has_its_old_name() -> None:
    assert set(leaves()) == UNMOVED | ADDED | set(OLD_NAMES.values())
    # An old name must not also be a setting of today's stage: a configuration could not say which it meant.
    assert not set(OLD_NAMES) & {name for name, _ in setting_fields(LexiconSettings)}
    assert len(set(OLD_NAMES.values())) == len(OLD_NAMES)  # no two old names share a place


@pytest.mark.parametrize("old, new", sorted(OLD_NAMES.items()))
def test_an_old_name_lands_on_its_new_place(old: str, new: str) -> None:
    value = sample(new, leaves()[new])
    assert at(LexiconSettings(), new) != value
    settings = LexiconSettings.model_validate({old: value})
    assert at(settings, new) == value
    assert settings.old_names_given == (old,)
    assert settings.model_dump() == LexiconSettings.model_validate(_nested(new, value)).model_dump()


def _nested(dotted: str, value: Any) -> dict[str, Any]:
    group, _, name = dotted.rpartition(".")
    return {group: {name: value}} if group else {name: value}


def test_new_names_record_no_old_ones() -> None:
    settings = LexiconSettings.model_validate({"general": {"min_score": 0.7}, "hints": {"person": ["call"]}})
    assert settings.general.min_score == 0.7 and settings.old_names_given == ()


def test_old_and_new_names_mix_across_settings_of_one_group() -> None:
    params: dict[str, Any] = {"min_score": 0.7, "general": {"margin": 0.1}}
    settings = LexiconSettings.model_validate(params)
    assert (settings.general.min_score, settings.general.margin) == (0.7, 0.1)
    assert params == {"min_score": 0.7, "general": {"margin": 0.1}}  # the caller's mapping is left as it was


def test_one_setting_under_both_names_is_an_error() -> None:
    with pytest.raises(ValidationError, match="min_score is the old name of general.min_score"):
        LexiconSettings.model_validate({"min_score": 0.7, "general": {"min_score": 0.6}})


def test_old_names_keep_the_rules_of_their_new_place() -> None:
    with pytest.raises(ValidationError) as caught:
        LexiconSettings.model_validate({"min_score": 3.0})
    assert [e["loc"] for e in caught.value.errors()] == [("general", "min_score")]
    with pytest.raises(ValidationError, match="at least one of weight_phone"):
        LexiconSettings.model_validate({"weight_phone": 0, "weight_spelling": 0, "weight_keys": 0})


def test_groups_forbid_unknown_keys() -> None:
    with pytest.raises(ValidationError) as caught:
        LexiconSettings.model_validate({"general": {"min_scor": 0.7}})
    [error] = caught.value.errors()
    assert (error["type"], error["loc"]) == ("extra_forbidden", ("general", "min_scor"))


def test_every_setting_has_a_description() -> None:
    assert [name for name, field in setting_fields(LexiconSettings) if not field.description] == []


def test_a_configuration_written_before_the_groups_builds_the_same_settings_as_its_grouped_form() -> None:
    # The workshop example's lexicon section as it stood before and after the settings were grouped.
    grouped = {
        "hints": WORKSHOP_FLAT["type_hints"],
        "general": {"min_score": 0.6, "short_penalty": 0.3},
        "context": {"gain_weight": 0.0, "loss_weight": 0.06},
        "anchored": {"types": ["person", "machine"], "hints": {"machine": ["the", "in", "on", "of"]},
                     "floors": {"machine": 0.72}, "min_phone": 0.68, "min_gain": 8.0, "min_pooled": 0.0},
    }
    nested = LexiconSettings.model_validate(grouped)
    assert nested.old_names_given == ()
    flat = LexiconSettings.model_validate(WORKSHOP_FLAT)
    assert set(flat.old_names_given) == set(WORKSHOP_FLAT)
    assert nested.model_dump() == flat.model_dump()