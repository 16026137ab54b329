"""The allocator setting of the tile loops: freed arrays are reused, not faulted in again."""

import subprocess
import sys
import textwrap

import pytest

_PROBE = textwrap.dedent(
    """
    import resource, sys
    import numpy as np
    from detector._allocator import reuse_freed_memory
    applied = reuse_freed_memory() if sys.argv[1] == "on" else None
    np.ones(1 << 20)  # warm up numpy's own caches
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(40):
        # a tile's working set: several float64 maps of 4.6 MB alive at once, then freed
        maps = [np.ones((864, 664)) for _ in range(6)]
        del maps
    after = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    print(applied, after - before)
    """
)


def _faults(mode):
    out = subprocess.run([sys.executable, "-c", _PROBE, mode], capture_output=True, text=True, check=True)
    applied, faults = out.stdout.split()
    return applied, int(faults)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="mallopt is glibc's")
def test_freed_tile_maps_are_reused_instead_of_faulted_in_again():
    # With glibc's default settings large arrays are mapped afresh, or the freed heap
    # top is given back once it exceeds the trim threshold, so the rounds fault their
    # pages in again (glibc manual, "Memory Allocation Tunables"; 4 KiB pages are
    # common practice on x86-64 Linux). With the setting only the first round does.
    applied, with_setting = _faults("on")
    _, default = _faults("off")
    if applied != "True":
        pytest.skip("this C library does not take mallopt settings")
    pages = 864 * 664 * 8 // 4096  # one map
    assert with_setting <= 6 * pages + 200  # at most the first round's six maps
    assert default >= 10 * with_setting
    from detector._allocator import reuse_freed_memory

    assert reuse_freed_memory() is reuse_freed_memory()  # applied once per process, same answer
