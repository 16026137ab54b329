"""GeoPackage layers of a screening: detections and tile footprints, written through GDAL (pyogrio).

A GeoPackage (OGC 12-128r18) stores each layer's CRS with it, so a GIS opens
the layers in the right place without guessing. Layers are written in the
raster's own CRS (for a Mars polar-stereographic image, its metres): no
reprojection, so nothing is lost between the image and its outlines.

Images without a CRS (a plain PNG or TIFF) get :data:`PIXEL_CRS_WKT`, an
engineering CRS named for what it is: x = column, y = -row, in pixels, with
pixel corners at whole numbers (the first pixel spans x 0..1, y 0..-1). Its y
axis points up, so a GIS does not show the image's outlines upside down, and
it is where GIS packages place an image that has no georeferencing (from
memory, QGIS and GDAL tools do so).
"""

import struct
from pathlib import Path

import numpy as np

from ..errors import DetectorError

__all__ = ["PIXEL_CRS_WKT", "polygon_wkb", "write_polygon_layer", "read_layer", "update_tile_routes"]

#: Engineering CRS of images without georeferencing: x = column, y = -row, px.
PIXEL_CRS_WKT = (
    'ENGCRS["frostvane image pixels (x = column, y = -row; no georeferencing)",'
    'EDATUM["image pixel grid"],CS[Cartesian,2],'
    'AXIS["x (column)",east,ORDER[1],LENGTHUNIT["pixel",1]],'
    'AXIS["y (minus row)",north,ORDER[2],LENGTHUNIT["pixel",1]]]'
)

_TEXT = "O"


def polygon_wkb(rings):
    """Well-known binary (little-endian, ISO 19125 / OGC 06-103r4) of one polygon.

    Parameters
    ----------
    rings : sequence of ndarray of shape (n, 2)
        Exterior ring first, then holes; open or closed (closed here).

    Returns
    -------
    wkb : bytes
        A 2-D Polygon (geometry type 3).
    """
    parts = [struct.pack("<BII", 1, 3, len(rings))]
    for ring in rings:
        ring = np.asarray(ring, dtype="<f8").reshape(-1, 2)
        if len(ring) and not np.array_equal(ring[0], ring[-1]):
            ring = np.vstack([ring, ring[:1]])
        parts.append(struct.pack("<I", len(ring)) + ring.tobytes())
    return b"".join(parts)


def _column(values):
    values = np.asarray(values)
    if values.dtype.kind in "OUS":
        return np.array(["" if v is None or (isinstance(v, float) and np.isnan(v)) else str(v) for v in values],
                        dtype=object)
    if values.dtype.kind == "b":
        return values.astype(np.int32)
    return values.astype(np.float64) if values.dtype.kind == "f" else values


def write_polygon_layer(path, layer, rings, fields, *, crs_wkt, description="", append=False):
    """Write (or append to) one polygon layer of a GeoPackage.

    Parameters
    ----------
    path : path-like
        ``.gpkg`` file (created when missing).
    layer : str
    rings : list of ndarray of shape (n, 2)
        One exterior ring per feature, in the layer's CRS.
    fields : dict of str to array-like
        Attribute columns, each as long as ``rings``; float NaN is written as null.
    crs_wkt : str
        The layer's CRS (WKT).
    description : str, optional
        Stored as the layer's description (``gpkg_contents``).
    append : bool, default=False
        Add the features to an existing layer.
    """
    import pyogrio.raw

    names = list(fields)
    data = [_column(fields[name]) for name in names]
    geometry = np.array([polygon_wkb([ring]) for ring in rings], dtype=object)
    kwargs = {} if append else {"layer_metadata": {"DESCRIPTION": description}} if description else {}
    try:
        pyogrio.raw.write(Path(path), geometry, data, names, layer=layer, driver="GPKG", geometry_type="Polygon",
                          crs=crs_wkt, append=append, **kwargs)
    except Exception as err:  # GDAL reports full disks, read-only folders and bad values alike
        raise DetectorError(f"GeoPackage {str(path)!r} layer {layer!r} cannot be written: {err}.") from err


def read_layer(path, layer):
    """Read one layer: ``(crs_wkt, rings, fields)`` with rings as exterior-ring arrays.

    Parameters
    ----------
    path : path-like
    layer : str

    Returns
    -------
    crs_wkt : str
    rings : list of ndarray of shape (n, 2)
    fields : dict of str to ndarray
    """
    import pyogrio.raw

    meta, _, geometry, data = pyogrio.raw.read(Path(path), layer=layer)
    rings = []
    for wkb in geometry:
        _, _, n_rings = struct.unpack_from("<BII", wkb, 0)
        (n,) = struct.unpack_from("<I", wkb, 9)
        rings.append(np.frombuffer(wkb, dtype="<f8", count=2 * n, offset=13).reshape(n, 2))
    return meta["crs"], rings, dict(zip(meta["fields"], data, strict=True))


def update_tile_routes(path, routes):
    """Set the ``route`` of tiles in the tile-footprint layers of a GeoPackage, atomically.

    Every layer is read and written again into a new file that replaces the
    old one only once complete (GDAL keeps the layers' CRSs, fields and
    descriptions).

    Parameters
    ----------
    path : path-like
        The screening's ``detections.gpkg``.
    routes : dict of str to str
        tile_id -> route; layers whose name starts with ``tiles`` are updated.
    """
    import pyogrio
    import pyogrio.raw

    from ..io import atomic_path

    path = Path(path)
    try:
        with atomic_path(path) as tmp:
            tmp.unlink()  # GDAL creates the file itself
            for k, (layer, geometry_type) in enumerate(pyogrio.list_layers(path)):
                meta, _, geometry, data = pyogrio.raw.read(path, layer=layer)
                fields = list(meta["fields"])
                if layer.startswith("tiles") and "route" in fields:
                    i = fields.index("route")
                    ids = data[fields.index("tile_id")]
                    data[i] = np.array([routes.get(str(t), r) for t, r in zip(ids, data[i], strict=True)],
                                       dtype=object)
                description = pyogrio.read_info(path, layer=layer).get("layer_metadata") or {}
                pyogrio.raw.write(tmp, geometry, data, fields, layer=layer, driver="GPKG",
                                  geometry_type=geometry_type, crs=meta["crs"], append=k > 0,
                                  layer_metadata={"DESCRIPTION": description.get("DESCRIPTION", "")})
    except Exception as err:  # GDAL reports damaged files and full disks alike
        raise DetectorError(f"GeoPackage {str(path)!r} cannot be updated: {err}.") from err
