"""Telling a cold compiled-loop cache from a warm one (detector/_jit.py).

numba's documented on-disk cache (``cache=True``; ``NUMBA_CACHE_DIR`` moves it) is the
reference: an empty cache folder must read as cold, a loop just compiled into it as warm.
Each check runs in a fresh interpreter, since numba fixes the cache folder at import.
"""

import os
import subprocess
import sys
from pathlib import Path

import pytest

from detector import _jit
from frostvane.cli import main

ROOT = Path(__file__).resolve().parents[2]


def _python(code, cache_dir):
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache_dir), "PYTHONPATH": str(ROOT)}
    return subprocess.run([sys.executable, "-c", code], env=env, cwd=ROOT, capture_output=True, text=True,
                          timeout=120)


def test_empty_cache_is_cold_and_announced(tmp_path):
    done = _python("from detector._jit import announce_compiling, cold_kernels\n"
                   "print(sorted(cold_kernels())); print(announce_compiling())", tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines() == [
        "['_kernels.cell_sums_f32', '_kernels.label_components', '_kernels.lbp_codes', '_readings.psum']", "True"]
    assert done.stderr.strip() == _jit.COMPILING_MESSAGE


def test_a_loop_compiled_into_the_cache_reads_warm(tmp_path):
    code = ("import numpy as np\n"
            "from detector import _jit\nfrom detector.tile import _kernels\n"
            "_kernels.cell_sums_f32(np.zeros((16, 16), np.float32), 16, 1, 1)\n"
            "print(sorted(_jit.cold_kernels()))\n")
    first = _python(code, tmp_path)
    assert first.returncode == 0, first.stderr
    assert "_kernels.cell_sums_f32" not in first.stdout and "_kernels.lbp_codes" in first.stdout
    # a new process finds the index numba wrote
    again = _python("from detector import _jit; print(sorted(_jit.cold_kernels()))", tmp_path)
    assert "_kernels.cell_sums_f32" not in again.stdout and "_kernels.lbp_codes" in again.stdout


@pytest.mark.parametrize(("argv", "cold", "expected"), [
    (["screen", "models/demo", "missing.tif", "--out", "{tmp}/s"], ["_kernels.lbp_codes"], True),
    (["screen", "models/demo", "missing.tif", "--out", "{tmp}/s"], [], False),
    (["validate", "{tmp}/no_such_set"], ["_kernels.lbp_codes"], False),
])
def test_cli_announces_only_commands_that_run_the_loops_on_a_cold_cache(argv, cold, expected, tmp_path,
                                                                        monkeypatch, capsys):
    monkeypatch.setattr(_jit, "cold_kernels", lambda: cold)
    monkeypatch.chdir(ROOT)
    assert main([a.format(tmp=tmp_path) for a in argv]) == 2
    assert (_jit.COMPILING_MESSAGE in capsys.readouterr().err) is expected
