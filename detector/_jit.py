"""Whether the compiled loops must be compiled before this run can use them.

numba keeps each compiled function in an on-disk cache (``cache=True``: an index file
``<module>.<function>-<line>.py<ver>.nbi`` beside its data files, in ``__pycache__`` or
under ``NUMBA_CACHE_DIR``). On a new machine, after an upgrade of numba or after the
source changed, the index is missing or stale and the first tile waits while every loop
is compiled (1-2 minutes on a slow machine). :func:`announce_compiling` says so in one
line instead of leaving the user with a progress bar at a fraction of its speed.
"""

import sys

__all__ = ["cold_kernels", "announce_compiling", "COMPILING_MESSAGE"]

COMPILING_MESSAGE = "frostvane: compiling the pixel loops once (1-2 minutes on a new machine)..."


def _sentinels():
    """Compiled loops every detected tile runs through: features, candidates, readings."""
    from .tile import _kernels
    from .objects import _readings

    return {
        "_kernels.lbp_codes": _kernels.lbp_codes,
        "_kernels.cell_sums_f32": _kernels.cell_sums_f32,
        "_kernels.label_components": _kernels.label_components,
        "_readings.psum": _readings.psum,
    }


def _has_valid_cache(dispatcher):
    """True when numba's cache holds an index for ``dispatcher`` that matches its source.

    numba drops an index whose source stamp (modification time and size of the module)
    or numba version differ, and compiles afresh; an empty index is read the same way.
    """
    cache = getattr(dispatcher, "_cache", None)
    cache_file = getattr(cache, "_cache_file", None)
    if cache_file is None:
        return True  # not a caching dispatcher (or another numba layout): claim nothing
    try:
        return bool(cache_file._load_index())
    except Exception:  # numba internals moved: say nothing rather than something false
        return True


def cold_kernels():
    """Names of the per-tile compiled loops with no usable on-disk cache.

    Returns
    -------
    names : list of str
        Empty when this process will load every sentinel loop from the cache.
    """
    return [name for name, dispatcher in _sentinels().items() if not _has_valid_cache(dispatcher)]


def announce_compiling(stream=None):
    """Print :data:`COMPILING_MESSAGE` on ``stream`` (default stderr) when the cache is cold.

    Returns
    -------
    cold : bool
        Whether the line was printed.
    """
    if not cold_kernels():
        return False
    print(COMPILING_MESSAGE, file=stream or sys.stderr, flush=True)
    return True
