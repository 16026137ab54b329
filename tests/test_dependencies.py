"""The installed libraries meet the floors pyproject.toml declares.

The floors are not decoration: with numpy 2.2 and older, ``np.sum`` of a long float64 array
adds in another order than numpy 2.3 and later, and the compiled sums that reproduce it
(``detector.objects._readings.psum``, held to ``np.sum`` in tests/detector/test_assemble.py) differ in
the last bit (checked by hand on numpy 1.26.4, 2.0.2, 2.2.6, 2.3.5 and 2.4.6; see
DEVELOPERS.md, "Dependency floors").
"""

import tomllib
from importlib import metadata
from pathlib import Path

import numpy as np
import pytest
from packaging.requirements import Requirement
from packaging.version import Version

PYPROJECT = Path(__file__).resolve().parents[1] / "pyproject.toml"


def _requirements():
    deps = tomllib.loads(PYPROJECT.read_text())["project"]["dependencies"]
    return [Requirement(text) for text in deps]


@pytest.mark.parametrize("req", _requirements(), ids=lambda r: r.name)
def test_installed_version_meets_declared_floor(req):
    installed = Version(metadata.version(req.name))
    # PEP 440 specifier matching (packaging), pre-releases allowed for a development install
    assert req.specifier.contains(installed, prereleases=True), f"{req.name} {installed} breaks {req.specifier}"


def test_numpy_floor_is_where_sum_order_is_reproduced():
    floor = next(r for r in _requirements() if r.name == "numpy")
    assert floor.specifier.contains("2.3.0") and not floor.specifier.contains("2.2.6")
    assert Version(np.__version__) >= Version("2.3")
