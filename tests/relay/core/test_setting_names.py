"""Grouped settings by dotted name, and flat names moved to their groups."""

from __future__ import annotations

from typing import Any

import pytest
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from relay.core.setting_names import (
    AcceptsOldNames,
    OldNameConflict,
    move_old_names,
    old_names_given,
    old_names_of,
    set_dotted,
    setting_fields,
)


class Loudness(BaseModel):
    model_config = ConfigDict(extra="forbid")

    gain: float = Field(1.0, le=10)
    floor: float = 0.0


class Shout(AcceptsOldNames):
    old_names = {"shout_gain": "loudness.gain", "mark": "marker"}

    marker: str = "!"
    loudness: Loudness = Field(default_factory=Loudness)


class Plain(BaseModel):
    marker: str = "!"


def test_old_names_move_to_their_place_and_are_remembered() -> None:
    shout = Shout.model_validate({"shout_gain": 2.0, "mark": "?", "loudness": {"floor": 0.5}})
    assert (shout.loudness.gain, shout.loudness.floor, shout.marker) == (2.0, 0.5, "?")
    assert shout.old_names_given == ("shout_gain", "mark")
    assert old_names_given(shout) == ("shout_gain", "mark")
    assert Shout(marker="?").old_names_given == ()


def test_a_setting_under_both_names_names_both() -> None:
    with pytest.raises(OldNameConflict) as caught:
        move_old_names({"shout_gain": 2.0, "loudness": {"gain": 3.0}}, Shout.old_names)
    assert caught.value.pairs == [("shout_gain", "loudness.gain")]
    with pytest.raises(ValidationError, match="shout_gain is the old name of loudness.gain"):
        Shout.model_validate({"shout_gain": 2.0, "loudness": {"gain": 3.0}})


def test_moving_leaves_the_given_mappings_alone() -> None:
    group = {"floor": 0.5}
    params: dict[str, Any] = {"shout_gain": 2.0, "loudness": group}
    moved, given = move_old_names(params, Shout.old_names)
    assert moved == {"loudness": {"floor": 0.5, "gain": 2.0}} and given == ["shout_gain"]
    assert params == {"shout_gain": 2.0, "loudness": {"floor": 0.5}} and group == {"floor": 0.5}


def test_a_group_that_is_no_mapping_is_left_to_validation() -> None:
    with pytest.raises(ValidationError) as caught:
        Shout.model_validate({"shout_gain": 2.0, "loudness": 5})
    assert {e["loc"] for e in caught.value.errors()} == {("loudness",), ("shout_gain",)}


def test_a_group_given_as_a_model_keeps_its_values() -> None:
    shout = Shout(loudness=Loudness(floor=0.5), shout_gain=2.0)  # type: ignore[call-arg]
    assert (shout.loudness.gain, shout.loudness.floor) == (2.0, 0.5)


def test_set_dotted_copies_along_the_path() -> None:
    params: dict[str, Any] = {"loudness": {"floor": 0.5}, "marker": "?"}
    out = set_dotted(params, "loudness.gain", 2.0)
    assert out == {"loudness": {"floor": 0.5, "gain": 2.0}, "marker": "?"}
    assert params == {"loudness": {"floor": 0.5}, "marker": "?"}
    assert set_dotted({}, "marker", "?") == {"marker": "?"}
    with pytest.raises(ValueError, match="marker is not a group"):
        set_dotted({"marker": "?"}, "marker.size", 2)


def test_settings_by_dotted_name_and_old_names_of_any_model() -> None:
    assert [name for name, _ in setting_fields(Shout)] == ["marker", "loudness", "loudness.gain", "loudness.floor"]
    assert old_names_of(Shout) == {"shout_gain": "loudness.gain", "mark": "marker"}
    assert old_names_of(Plain) == {} and old_names_given(Plain()) == ()
