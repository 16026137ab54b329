"""Surface winds by region and season from fan catalogs (``frostvane winds``): catalogs, analysis, plots.

Names load their module on first use.
"""

from detector._lazy import lazy_exports

__getattr__, __dir__ = lazy_exports(__name__, {
    "FanCatalog": "wind_catalogs",
    "read_machine_catalog": "wind_catalogs",
    "WindSettings": "winds",
    "analyse_winds": "winds",
    "write_winds": "winds",
})

__all__ = ["FanCatalog", "WindSettings", "analyse_winds", "read_machine_catalog", "write_winds"]
