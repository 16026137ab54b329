"""Detections as GeoJSON (RFC 7946) feature collections.

Every detection becomes one Feature: a fan is a circular-sector polygon (apex,
then its arc), a spot an elliptical polygon, with the detection's columns as
properties (NaN written as ``null``).

Coordinates
-----------
RFC 7946 positions are longitude and latitude in degrees; the standard names
WGS 84, which does not exist on Mars, and it forbids a ``crs`` member. So, with
a :class:`~detector.gis.geo.Georeferencer`, positions are ``[lon, lat]``:

* planetocentric latitude (the angle at Mars's centre; identical to latitude
  on the IAU 2015 Mars sphere of radius 3 396 190 m, which is the geographic
  CRS to read the file with, :data:`detector.gis.geo.MARS_GEOGRAPHIC`);
* longitude east-positive in [-180, 180] (RFC 7946 section 4 range); a
  polygon crossing the antimeridian is cut there into a MultiPolygon
  (section 3.1.9), and one that encloses a pole is closed along the
  antimeridian through the pole.

The collection has no member besides ``type`` and ``features``. Each feature
also gets ``lon_deg``, ``lat_deg`` (of its apex / centre, the same
convention), ``azimuth_deg`` (degrees clockwise from north; for spots the long
axis mod 180) and, for fans, ``wind_from_deg``.

Without a georeferencer, positions are image pixels ``(x = col, y = row)``,
origin at the centre of the top-left pixel, y down: for drawing and tests only
(a GIS would take them for degrees, so ``frostvane screen`` writes no GeoJSON
for images without a CRS; the GeoPackage names their pixel grid instead).

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

from ..errors import DetectorError
from ..io import atomic_path
from ..labels import ellipse_polygon, sector_polygon

__all__ = [
    "detections_to_geojson",
    "detection_rings",
    "write_geojson",
    "write_geojson_chunks",
    "ring_signed_area",
    "split_lonlat_ring",
]

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


def detection_rings(detections_df, *, n_arc=32, n_ellipse=48):
    """Outline of every detection in image px (open rings, no repeated first vertex).

    Parameters
    ----------
    detections_df : DataFrame
        ``kind``, ``x_px``, ``y_px``, ``direction_deg`` and the fan / spot
        geometry columns (see :func:`detections_to_geojson`).
    n_arc, n_ellipse : int, optional
        Vertices on a fan's arc and a spot's outline.

    Returns
    -------
    rings : list of ndarray of shape (n, 2)
        (x = col, y = row) vertices, px.
    kinds : ndarray of str
    """
    df = detections_df.reset_index(drop=True)
    kinds = _check(df)
    num = {c: pd.to_numeric(df[c], errors="coerce").to_numpy(dtype=float) for c in _GEOMETRY if c in df.columns}
    rings = [
        np.asarray(sector_polygon(num["x_px"][i], num["y_px"][i], num["direction_deg"][i], num["length_px"][i],
                                  num["opening_deg"][i], n=n_arc), dtype=float)
        if kinds[i] == "fan"
        else np.asarray(ellipse_polygon(num["x_px"][i], num["y_px"][i], num["direction_deg"][i],
                                        num["semi_major_px"][i], num["semi_minor_px"][i], n=n_ellipse), dtype=float)
        for i in range(len(df))
    ]
    return rings, kinds


def _clip(poly, keep_below, x0):
    """Sutherland-Hodgman clip of a closed-free polygon to x <= x0 (or x >= x0)."""
    out = []
    n = len(poly)
    for k in range(n):
        cur, nxt = poly[k], poly[(k + 1) % n]
        inside_c = cur[0] <= x0 if keep_below else cur[0] >= x0
        inside_n = nxt[0] <= x0 if keep_below else nxt[0] >= x0
        if inside_c:
            out.append(cur)
        if inside_c != inside_n:
            t = (x0 - cur[0]) / (nxt[0] - cur[0])
            out.append((x0, cur[1] + t * (nxt[1] - cur[1])))
    return out


def split_lonlat_ring(lon, lat):
    """Rings of one lon/lat polygon within [-180, 180], cut at the antimeridian.

    Parameters
    ----------
    lon, lat : ndarray of shape (n,)
        Vertices of an open ring, degrees (longitude in any 360-degree range).

    Returns
    -------
    rings : list of ndarray of shape (m, 2)
        Open (lon, lat) rings, longitude in [-180, 180]: one when the polygon
        does not cross the antimeridian, otherwise its pieces (RFC 7946
        section 3.1.9). A ring that winds once around a pole is closed
        through that pole along the antimeridian.
    """
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    steps = (np.diff(np.append(lon, lon[0])) + 180.0) % 360.0 - 180.0
    winding = steps.sum()
    unwrapped = lon[0] + np.concatenate([[0.0], np.cumsum(steps[:-1])])
    poly = list(zip(unwrapped, lat, strict=True))
    if abs(winding) > 180.0:
        # Around a pole: walk on to the pole and back along the meridian of the start.
        pole = 90.0 if np.mean(lat) > 0 else -90.0
        end = unwrapped[-1] + steps[-1]
        poly = poly + [(end, lat[0]), (end, pole), (unwrapped[0], pole)]
    pieces = []
    for shift in (-720.0, -360.0, 0.0, 360.0, 720.0):
        shifted = [(x + shift, y) for x, y in poly]
        xs = [x for x, _ in shifted]
        if max(xs) <= -180.0 or min(xs) >= 180.0:
            continue
        part = _clip(_clip(shifted, True, 180.0), False, -180.0)
        if len(part) >= 3 and abs(ring_signed_area(part)) > 0:
            pieces.append(np.asarray(part, dtype=float))
    return pieces


def detections_to_geojson(detections_df, *, georef=None, n_arc=32, n_ellipse=48):
    """Turn detections into a GeoJSON FeatureCollection.

    Parameters
    ----------
    detections_df : DataFrame
        One row per detection with ``kind``, ``x_px``, ``y_px`` (px of the
        raster the georeferencer belongs to, of the fan apex / spot centre),
        ``direction_deg`` (degrees clockwise from image up), ``length_px``
        and ``opening_deg`` (full opening, degrees) for fans,
        ``semi_major_px`` and ``semi_minor_px`` for spots; any further columns
        (``tile_id``, ``score``, ...) are copied to the properties.
    georef : detector.gis.geo.Georeferencer, optional
        Write planetocentric longitude / latitude; without it, image pixels
        (not for GIS; see the module notes).
    n_arc : int, optional
        Vertices on a fan's arc.
    n_ellipse : int, optional
        Vertices on a spot's outline.

    Returns
    -------
    collection : dict
        A FeatureCollection with members ``type`` and ``features`` only.
    """
    df = detections_df.reset_index(drop=True)
    rings, kinds = detection_rings(df, n_arc=n_arc, n_ellipse=n_ellipse)
    properties = [
        {str(k): _json_value(v) for k, v in record.items()} for record in df.astype(object).to_dict("records")
    ]
    geometries = [{"type": "Polygon", "coordinates": [_ring(ring).tolist()]} for ring in rings]
    if georef is not None and rings:
        num = {c: pd.to_numeric(df[c], errors="coerce").to_numpy(dtype=float)
               for c in ("x_px", "y_px", "direction_deg")}
        # One projection call for every vertex of every feature.
        sizes = [len(r) for r in rings]
        allv = np.vstack(rings)
        lon_v, lat_v = georef.pixel_to_planetocentric(allv[:, 0], allv[:, 1])
        cuts = np.cumsum(sizes)[:-1]
        geometries = []
        for lon_r, lat_r in zip(np.split(np.atleast_1d(lon_v), cuts), np.split(np.atleast_1d(lat_v), cuts),
                                strict=True):
            parts = [_ring(p).tolist() for p in split_lonlat_ring(lon_r, lat_r)]
            geometries.append({"type": "Polygon", "coordinates": [parts[0]]} if len(parts) == 1
                              else {"type": "MultiPolygon", "coordinates": [[p] for p in parts]})
        lon, lat = georef.pixel_to_planetocentric(num["x_px"], num["y_px"])
        azimuth = np.asarray(georef.grid_to_azimuth(num["direction_deg"], num["x_px"], num["y_px"]), dtype=float)
        is_fan = kinds == "fan"
        azimuth = np.where(is_fan, azimuth, azimuth % 180.0)
        wind = np.where(is_fan, (azimuth + 180.0) % 360.0, np.nan)
        extra = {"lon_deg": np.atleast_1d(lon), "lat_deg": np.atleast_1d(lat), "azimuth_deg": azimuth,
                 "wind_from_deg": wind}
        for i, props in enumerate(properties):
            for key, values in extra.items():
                props.setdefault(key, _json_value(float(values[i])))
    return {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "geometry": geometry, "properties": props}
            for geometry, props in zip(geometries, properties, strict=True)
        ],
    }


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

    The members of the first collection other than ``features`` head the file; the features of every collection follow,
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
