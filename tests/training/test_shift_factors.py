"""The shifted-settings script's groups cover exactly the settings in which the two scene profiles differ."""

import dataclasses

import pytest

from tests.benchmarks import shift_factors as script
from training.synth import SCENE_PROFILES, SceneSettings


def test_every_shifted_setting_is_in_one_group():
    differ = script._check_groups(SCENE_PROFILES["nominal"], SCENE_PROFILES["shifted"])
    grouped = [name for names in script.GROUPS.values() for name in names]
    assert set(differ) <= set(grouped) and len(grouped) == len(set(grouped))
    assert {f.name for f in dataclasses.fields(SceneSettings)} >= set(grouped)
    # Every group but the nominal one has a row in the README's table, so each must shift something.
    assert all(set(names) & set(differ) for group, names in script.GROUPS.items() if group != "nominal")


def test_a_setting_outside_every_group_stops_the_script(monkeypatch):
    monkeypatch.setattr(script, "GROUPS", {**script.GROUPS, "blur": ()})  # blur_sigma_px now belongs to no group
    with pytest.raises(SystemExit, match="blur_sigma_px"):
        script._check_groups(SCENE_PROFILES["nominal"], SCENE_PROFILES["shifted"])
