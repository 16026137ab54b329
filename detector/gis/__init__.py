"""Rasters and maps: windowed raster reading, Mars georeferencing, GeoJSON and GeoPackage output.

Names load their module on first use (rasterio, pyproj and pyogrio are imported only when needed).
"""

from .._lazy import lazy_exports

__getattr__, __dir__ = lazy_exports(__name__, {
    "RasterSource": "raster",
    "TileWindow": "raster",
    "mosaic_tiles": "raster",
    "open_raster": "raster",
    "plan_windows": "raster",
    "write_geotiff": "raster",
    "Georeferencer": "geo",
    "MARS_GEOGRAPHIC": "geo",
    "MARS_SOUTH_POLAR_STEREO": "geo",
    "check_mars_crs": "geo",
    "polygon_ground_area_m2": "geo",
    "detections_to_geojson": "geojson",
    "write_geojson": "geojson",
    "read_layer": "gpkg",
    "write_polygon_layer": "gpkg",
})

__all__ = [
    "Georeferencer",
    "MARS_GEOGRAPHIC",
    "MARS_SOUTH_POLAR_STEREO",
    "RasterSource",
    "TileWindow",
    "check_mars_crs",
    "detections_to_geojson",
    "mosaic_tiles",
    "open_raster",
    "plan_windows",
    "polygon_ground_area_m2",
    "read_layer",
    "write_geojson",
    "write_geotiff",
    "write_polygon_layer",
]
