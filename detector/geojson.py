"""Detections as GeoJSON (RFC 7946) feature collections.

Every detection becomes one Feature: a fan is a circular-sector polygon (apex,
then its arc), a spot an elliptical polygon, with the detection's columns as
properties (NaN written as ``null``).

Coordinates
-----------
RFC 7946 prefers WGS 84 longitude/latitude, which does not exist on Mars. So:

* with a :class:`~detector.geo.Georeferencer`, coordinates are map
  coordinates ``(x, y)`` of the raster's own projected CRS (e.g. Mars south
  polar stereographic, metres). The collection names that CRS in a ``crs``
  member in the style of the 2008 GeoJSON specification (``{"type": "name",
  "properties": {"name": ..., "wkt": ...}}``, plus ``"authority":
  "AUTH:CODE"`` when PROJ finds an exact match; ``wkt`` is WKT2 because a
  Mars CRS usually has no OGC URN) and sets ``"coordinates": "map"``. Each
  feature also gets ``lon_deg``, ``lat_deg`` (of its apex / centre),
  ``azimuth_deg`` (degrees clockwise from north; for spots the long axis mod
  180) and, for fans, ``wind_from_deg``.
* without one, coordinates are image pixels ``(x = col, y = row)``, origin at
  the centre of the top-left pixel, y down, and the collection says
  ``"coordinates": "image_px"`` with no ``crs`` member.

Exterior rings are closed and counter-clockwise in the written coordinates
(RFC 7946 section 3.1.6, right-hand rule), i.e. positive shoelace area with x
to the right and y up. In image pixels (y down) that ring looks clockwise on
screen.
"""

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import DetectorError
from .io import atomic_path
from .labels import ellipse_polygon, sector_polygon

__all__ = ["detections_to_geojson", "write_geojson", "write_geojson_chunks", "ring_signed_area"]

_BASE_COLUMNS = ("kind", "x_px", "y_px", "direction_deg")
_KIND_COLUMNS = {"fan": ("length_px", "opening_deg"), "spot": ("semi_major_px", "semi_minor_px")}
_GEOMETRY = _BASE_COLUMNS[1:] + _KIND_COLUMNS["fan"] + _KIND_COLUMNS["spot"]


def ring_signed_area(ring):
    """Shoelace area of a ring, positive when counter-clockwise with y up.

    Parameters
    ----------
    ring : array-like of shape (n, 2)
        Vertices (x, y), closed or not.

    Returns
    -------
    area : float
        In squared coordinate units.
    """
    ring = np.asarray(ring, dtype=float)
    x, y = ring[:, 0], ring[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def _check(df):
    missing = [c for c in _BASE_COLUMNS if c not in df.columns]
    if missing:
        raise DetectorError(f"detections lack column(s) {', '.join(missing)}.")
    kinds = df["kind"].astype(str)
    unknown = ~kinds.isin(list(_KIND_COLUMNS))
    if unknown.any():
        i = int(np.flatnonzero(unknown.to_numpy())[0])
        raise DetectorError(f"detections row {i + 1}: kind {df['kind'].iloc[i]!r} is not one of fan, spot.")
    for kind, extra in _KIND_COLUMNS.items():
        rows = df.loc[(kinds == kind).to_numpy()]
        if rows.empty:
            continue
        cols = [c for c in extra if c not in df.columns]
        if cols:
            raise DetectorError(f"detections have {kind}s but lack column(s) {', '.join(cols)}.")
        values = rows[list(_BASE_COLUMNS[1:] + extra)].apply(pd.to_numeric, errors="coerce")
        bad = ~np.isfinite(values.to_numpy(dtype=float))
        if bad.any():
            r, c = np.argwhere(bad)[0]
            i = int(np.flatnonzero((kinds == kind).to_numpy())[r])
            raise DetectorError(
                f"detections row {i + 1}: {kind} {values.columns[c]} {rows.iloc[r][values.columns[c]]!r} "
                f"is not a finite number."
            )
    return kinds.to_numpy()


def _ring(vertices):
    """Close a ring and make it counter-clockwise (positive area, y up)."""
    if ring_signed_area(vertices) < 0:
        vertices = vertices[::-1]
    return np.vstack([vertices, vertices[:1]])


def _json_value(value):
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, (np.generic,)):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (str, int, float, bool)):
        return value
    return str(value)


def detections_to_geojson(detections_df, *, georef=None, n_arc=32, n_ellipse=48):
    """Turn detections into a GeoJSON FeatureCollection.

    Parameters
    ----------
    detections_df : DataFrame
        One row per detection with ``kind``, ``x_px``, ``y_px`` (image px of
        the fan apex / spot centre), ``direction_deg`` (degrees clockwise from
        image up), ``length_px`` and ``opening_deg`` (full opening, degrees) for
        fans, ``semi_major_px`` and ``semi_minor_px`` for spots; any further
        columns (``tile_id``, ``score``, ...) are copied to the properties.
    georef : detector.geo.Georeferencer, optional
        Write map coordinates of its CRS; without it, image pixels.
    n_arc : int, optional
        Vertices on a fan's arc.
    n_ellipse : int, optional
        Vertices on a spot's outline.

    Returns
    -------
    collection : dict
        A FeatureCollection; see the module notes for the coordinates.
    """
    df = detections_df.reset_index(drop=True)
    kinds = _check(df)
    num = {c: pd.to_numeric(df[c], errors="coerce").to_numpy(dtype=float) for c in _GEOMETRY if c in df.columns}
    rings = [
        sector_polygon(num["x_px"][i], num["y_px"][i], num["direction_deg"][i], num["length_px"][i],
                       num["opening_deg"][i], n=n_arc)
        if kinds[i] == "fan"
        else ellipse_polygon(num["x_px"][i], num["y_px"][i], num["direction_deg"][i], num["semi_major_px"][i],
                             num["semi_minor_px"][i], n=n_ellipse)
        for i in range(len(df))
    ]
    properties = [
        {str(k): _json_value(v) for k, v in record.items()} for record in df.astype(object).to_dict("records")
    ]
    collection = {"type": "FeatureCollection"}
    if georef is not None and rings:
        # One projection call for every vertex of every feature.
        sizes = [len(r) for r in rings]
        allv = np.vstack(rings)
        mx, my = georef.pixel_to_map(allv[:, 0], allv[:, 1])
        rings = np.split(np.column_stack([mx, my]), np.cumsum(sizes)[:-1])
        lon, lat = georef.pixel_to_lonlat(num["x_px"], num["y_px"])
        azimuth = np.asarray(georef.grid_to_azimuth(num["direction_deg"], num["x_px"], num["y_px"]), dtype=float)
        is_fan = kinds == "fan"
        azimuth = np.where(is_fan, azimuth, azimuth % 180.0)
        wind = np.where(is_fan, (azimuth + 180.0) % 360.0, np.nan)
        extra = {"lon_deg": np.atleast_1d(lon), "lat_deg": np.atleast_1d(lat), "azimuth_deg": azimuth,
                 "wind_from_deg": wind}
        for i, props in enumerate(properties):
            for key, values in extra.items():
                props.setdefault(key, _json_value(float(values[i])))
    if georef is not None:
        collection["coordinates"] = "map"
        crs_props = {"name": georef.crs.name, "wkt": georef.crs.to_wkt()}
        auth = georef.crs.to_authority(min_confidence=90)
        if auth:
            crs_props["authority"] = f"{auth[0]}:{auth[1]}"
        collection["crs"] = {"type": "name", "properties": crs_props}
    else:
        collection["coordinates"] = "image_px"
    collection["features"] = [
        {
            "type": "Feature",
            "geometry": {"type": "Polygon", "coordinates": [_ring(np.asarray(ring, dtype=float)).tolist()]},
            "properties": props,
        }
        for ring, props in zip(rings, properties, strict=True)
    ]
    return collection


def write_geojson(path, collection):
    """Write a FeatureCollection as UTF-8 JSON, atomically.

    Non-finite numbers are refused (they are not valid JSON); use ``None``.
    """
    path = Path(path)
    try:
        text = json.dumps(collection, allow_nan=False, ensure_ascii=False)
    except (TypeError, ValueError) as err:
        raise DetectorError(f"GeoJSON for {str(path)!r} cannot be written: {err}.") from err
    with atomic_path(path) as tmp:
        tmp.write_text(text + "\n", encoding="utf-8")


def write_geojson_chunks(path, collections):
    """Write FeatureCollections one after another as one collection, streaming, atomically.

    The members of the first collection other than ``features`` (type, CRS,
    coordinate note) head the file; the features of every collection follow,
    each serialised on its own, so memory holds one chunk at a time, not the
    whole catalog.

    Parameters
    ----------
    path : path-like
    collections : iterable of dict
        FeatureCollections of consecutive chunks of detections (at least one).
    """
    path = Path(path)
    with atomic_path(path) as tmp, open(tmp, "w", encoding="utf-8") as handle:
        head_written, n_written = False, 0
        try:
            for collection in collections:
                if not head_written:
                    head = {k: v for k, v in collection.items() if k != "features"}
                    text = json.dumps(head, allow_nan=False, ensure_ascii=False)
                    handle.write(text[:-1] + (', "features": [' if head else '"features": ['))
                    head_written = True
                for feature in collection["features"]:
                    handle.write((",\n" if n_written else "") + json.dumps(feature, allow_nan=False, ensure_ascii=False))
                    n_written += 1
            if not head_written:
                handle.write('{"type": "FeatureCollection", "features": [')
            handle.write("]}\n")
        except (TypeError, ValueError) as err:
            raise DetectorError(f"GeoJSON for {str(path)!r} cannot be written: {err}.") from err
