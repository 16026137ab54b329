"""Whole-image screening (``frostvane screen``): plan tiles, run them in workers, journal, write outputs."""

from .._lazy import lazy_exports

__getattr__, __dir__ = lazy_exports(__name__, {
    "ScreenSummary": "outputs",
    "screen": "run",
})

__all__ = ["ScreenSummary", "screen"]
