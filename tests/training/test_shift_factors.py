"""The shifted-settings script's groups cover exactly the settings in which the two scene profiles differ."""

import dataclasses
import importlib.util
from pathlib import Path

import pytest

from training.synth import SCENE_PROFILES, SceneSettings

_SCRIPT = Path(__file__).resolve().parents[1] / "benchmarks" / "shift_factors.py"


def _script():
    spec = importlib.util.spec_from_file_location("shift_factors", _SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_every_shifted_setting_is_in_one_group():
    script = _script()
    differ = script._check_groups(SCENE_PROFILES["nominal"], SCENE_PROFILES["shifted"])
    grouped = [name for names in script.GROUPS.values() for name in names]
    assert set(differ) <= set(grouped) and len(grouped) == len(set(grouped))
    assert {f.name for f in dataclasses.fields(SceneSettings)} >= set(grouped)
    # Every group but the nominal one has a row in the README's table, so each must shift something.
    assert all(set(names) & set(differ) for group, names in script.GROUPS.items() if group != "nominal")


def test_a_setting_outside_every_group_stops_the_script():
    script = _script()
    script.GROUPS = {**script.GROUPS, "blur": ()}  # blur_sigma_px now belongs to no group
    with pytest.raises(SystemExit, match="blur_sigma_px"):
        script._check_groups(SCENE_PROFILES["nominal"], SCENE_PROFILES["shifted"])
