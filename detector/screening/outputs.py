"""The screening outputs, written from the journal one image at a time: CSV, GeoPackage, GeoJSON, quick-look, rose."""

import base64
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..inference.detect import fan_direction_weights, tile_direction_stats
from ..gis.geojson import write_geojson_chunks
from ..io import atomic_path
from .folder import (
    _GEOJSON,
    _GPKG,
    _MAX_DRAWN,
    _MAX_PANELS,
    _OUTPUT_FILES,
    _ROSE_BINS,
    _STRIP_BYTES,
    DEPOSIT_THRESHOLD,
    DETECTION_OUTPUT_COLUMNS,
    GEO_COLUMNS,
    GEOJSON_COORDINATES,
    TILE_COLUMNS,
    smoothed_flags,
)
from .plan import _canvas_step, _image_size, _open, _panel_cap
from .workers import _core_corners

__all__ = ["ScreenSummary"]


def _frames(entries, columns):
    """tiles.csv and detections.csv rows of some journal entries (one image's), typed."""
    tiles = pd.DataFrame([e["tile"] for e in entries], columns=list(TILE_COLUMNS))
    for c in ("col0", "row0"):
        tiles[c] = pd.array(np.where(np.isfinite(tiles[c].to_numpy(dtype=float)), tiles[c], np.nan)).astype("Int64")
    for c in ("width", "height", "n_fans", "n_spots"):
        tiles[c] = tiles[c].astype(np.int64)
    tiles["route"] = tiles["route"].astype(str)
    merged = {c: [] for c in columns}
    for entry in entries:
        det = entry["detections"]
        n = len(det["tile_id"])
        for c in columns:
            merged[c].extend(det.get(c, [np.nan] * n))
    detections = pd.DataFrame(merged, columns=columns)
    text = ("tile_id", "kind", "image")
    for c in columns:
        if c not in text:
            detections[c] = pd.to_numeric(detections[c], errors="coerce").astype(float)
    for c in ("col0", "row0"):
        detections[c] = detections[c].astype("Int64")
    detections["votes"] = detections["votes"].astype("Int64")
    return tiles, detections


def _image_offsets(detections, tasks):
    """(file path, file-px x offset, file-px y offset) of every detection's tile."""
    table = pd.DataFrame(
        {"path": [t.path for t in tasks], "ox": [t.file_col0 for t in tasks], "oy": [t.file_row0 for t in tasks]},
        index=[t.tile_id for t in tasks],
    )
    rows = table.loc[detections["tile_id"].to_numpy()]
    return rows["path"].to_numpy(dtype=object), rows["ox"].to_numpy(dtype=float), rows["oy"].to_numpy(dtype=float)


@dataclass(frozen=True)
class _GeoContext:
    """Run-wide georeferencing: every file's georeferencer and its GeoPackage layer pair.

    Files that share a CRS share a pair of layers (``detections`` and
    ``tiles``, numbered ``_2``, ``_3``, ... when the run holds several CRSs);
    files without a CRS share the pair in image pixels.
    """

    georefs: dict
    layers: dict  # file path -> (layer suffix, CRS WKT or None)

    @property
    def any_georeferenced(self):
        return any(g is not None for g in self.georefs.values())

    @classmethod
    def of(cls, images):
        georefs = {}
        for entry in images.values():
            georefs.update(entry["georefs"])
        keys = []
        for g in georefs.values():
            key = None if g is None else g.crs.to_wkt()
            if key not in keys:
                keys.append(key)
        suffix = {key: "" if len(keys) == 1 else f"_{k + 1}" for k, key in enumerate(keys)}
        layers = {path: (suffix[None if g is None else g.crs.to_wkt()], None if g is None else g.crs.to_wkt())
                  for path, g in georefs.items()}
        return cls(georefs, layers)

    def describe(self):
        """One line per GeoPackage layer pair: what its coordinates are."""
        out = {}
        for path, (suffix, _wkt) in self.layers.items():
            g = self.georefs[path]
            out.setdefault(suffix, "image pixels (x = column, y = -row), no CRS" if g is None
                           else f"map coordinates of {g.crs.name!r}")
        return {f"detections{k}, tiles{k}": v for k, v in out.items()}


def _geojson_chunks(detections, tasks, geo, *, chunk=2000):
    """FeatureCollections of consecutive chunks of the georeferenced detections (maybe empty)."""
    if detections.empty:
        return
    paths, _, _ = _image_offsets(detections, tasks)
    georeferenced = np.array([geo.georefs[p] is not None for p in paths], dtype=bool)
    detections = detections.loc[georeferenced]
    for start in range(0, len(detections), chunk):
        yield _geojson(detections.iloc[start:start + chunk], tasks, geo)


def _geojson(detections, tasks, geo):
    """Planetocentric lon/lat FeatureCollection of georeferenced detections (see detector.gis.geojson)."""
    from ..gis.geojson import detections_to_geojson

    paths, ox, oy = _image_offsets(detections, tasks)
    df = detections.copy()
    df["x_px"] = df["x_px"] + ox
    df["y_px"] = df["y_px"] + oy
    features = []
    for path in pd.unique(paths):
        features.extend(detections_to_geojson(df.loc[paths == path], georef=geo.georefs[path])["features"])
    return {"type": "FeatureCollection", "features": features}


def _pixel_crs_xy(cols, rows):
    """Image px (centre convention) to the GeoPackage's pixel CRS: x = column, y = -row, corners at integers."""
    return np.column_stack([np.asarray(cols, dtype=float) + 0.5, -(np.asarray(rows, dtype=float) + 0.5)])


_TEXT_COLUMNS = ("tile_id", "image", "route", "kind")


def _layer_fields(frame):
    """GeoPackage attribute columns of a frame: text as str, everything else float (NaN = null)."""
    return {c: frame[c].astype(str).to_numpy(dtype=object) if c in _TEXT_COLUMNS
            else pd.to_numeric(frame[c], errors="coerce").to_numpy(dtype=float) for c in frame.columns}


def _write_gpkg_chunk(path, name, tiles, detections, tasks, images, geo, created):
    """Append one image's detections and tile footprints to the GeoPackage's layers.

    ``created`` is the set of layers already in the file (updated here).
    """
    from ..gis.geojson import detection_rings
    from ..gis.gpkg import PIXEL_CRS_WKT, write_polygon_layer

    pieces = {p.path: p for p in images[name]["pieces"]}
    by_tile = {t.tile_id: t for t in tasks}

    def layer_xy(file_path, cols, rows):
        # cols, rows: px of the file; to the layer's coordinates
        georef = geo.georefs[file_path]
        if georef is None:
            piece = pieces[file_path]
            return _pixel_crs_xy(np.asarray(cols) + piece.col0, np.asarray(rows) + piece.row0)
        return np.column_stack([np.atleast_1d(v) for v in georef.pixel_to_map(cols, rows)])

    def write(layer, wkt, rings, fields, what):
        write_polygon_layer(path, layer, rings, fields, crs_wkt=wkt or PIXEL_CRS_WKT,
                            description=f"frostvane {what}" + ("" if wkt else
                                                               "; image pixels, x = column, y = -row, no CRS"),
                            append=layer in created)
        created.add(layer)

    tile_paths = np.array([by_tile[t].path for t in tiles["tile_id"]], dtype=object)
    det_paths, ox, oy = _image_offsets(detections, tasks) if len(detections) else (np.array([], dtype=object),) * 3
    suffixes = {geo.layers[p] for p in pd.unique(tile_paths)}
    for suffix, wkt in sorted(suffixes, key=lambda k: k[0]):
        files = [p for p in pd.unique(tile_paths) if geo.layers[p] == (suffix, wkt)]
        # tile footprints
        sel = np.isin(tile_paths, files)
        part = tiles.loc[sel]
        rings = []
        for tile_id, file_path in zip(part["tile_id"], tile_paths[sel], strict=True):
            corners = _core_corners(by_tile[tile_id].window)
            rings.append(layer_xy(file_path, corners[:, 0], corners[:, 1]))
        fields = _layer_fields(part)
        fields["covered_fraction"] = (part["fan_cover"] + part["spot_cover"]).to_numpy(dtype=float)
        write(f"tiles{suffix}", wkt, rings, fields, "tile footprints (cores) with p_deposit, route and cover")
        # detections
        sel = np.isin(det_paths, files)
        part = detections.loc[sel]
        file_x = part["x_px"].to_numpy(dtype=float) + np.asarray(ox[sel], dtype=float)
        file_y = part["y_px"].to_numpy(dtype=float) + np.asarray(oy[sel], dtype=float)
        outlines, _ = detection_rings(part.assign(x_px=file_x, y_px=file_y))
        rings = [layer_xy(fp, r[:, 0], r[:, 1]) for fp, r in zip(det_paths[sel], outlines, strict=True)]
        fields = _layer_fields(part)
        write(f"detections{suffix}", wkt, rings, fields, "detections (fan sectors, spot ellipses)")


def _decimated(piece, band, nodata, step):
    """Every ``step``-th pixel of a piece in both axes, and its no-data mask.

    The file is read in strips of full rows of a few tens of MB each, so
    memory does not follow the image size. (A single resampled read with
    ``out_shape`` was tens of times slower on tiled, compressed GeoTIFFs.)
    """
    with _open(piece.path, band, nodata) as src:
        rows_per_strip = step * max(1, (_STRIP_BYTES // max(1, piece.width * src.dtype.itemsize)) // step)
        strips, masks = [], []
        for r0 in range(0, piece.height, rows_per_strip):
            h = min(rows_per_strip, piece.height - r0)
            array, mask = src.read((0, r0, piece.width, h))
            strips.append(array[::step, ::step].astype(np.float32))
            # A copy: a strided view would keep every strip's full-size mask alive.
            masks.append(mask[::step, ::step].copy())
    return np.vstack(strips), np.vstack(masks)


def _canvas(entry, band, nodata, cap, blocks=None):
    """An image's quick-look canvas (every ``step``-th pixel, NaN on no-data) and its scale.

    ``blocks`` lists ``(path, block)`` of every tile of the image as the workers
    sampled them (see :func:`_canvas_block`); without it (a journal written by an
    older version) the image files are read again.
    """
    pieces = entry["pieces"]
    width, height = _image_size(entry)
    step = _canvas_step(entry, cap)
    scale = 1.0 / step
    canvas = np.full((-(-height // step), -(-width // step)), np.nan, np.float32)
    if blocks is not None:
        where = {p.path: (-(-p.row0 // step), -(-p.col0 // step)) for p in pieces}
        for path, block in blocks:
            if block is None:
                continue
            values = np.frombuffer(base64.b64decode(block["values"]), dtype="<f4")
            values = values.reshape(block["height"], block["width"])
            r0, c0 = where[path]
            r0, c0 = r0 + block["row"], c0 + block["col"]
            h = min(values.shape[0], canvas.shape[0] - r0)
            w = min(values.shape[1], canvas.shape[1] - c0)
            canvas[r0 : r0 + h, c0 : c0 + w] = values[:h, :w]
        return canvas, scale
    for p in pieces:
        array, mask = _decimated(p, band, nodata, step)
        r0, c0 = -(-p.row0 // step), -(-p.col0 // step)
        h = min(array.shape[0], canvas.shape[0] - r0)
        w = min(array.shape[1], canvas.shape[1] - c0)
        canvas[r0 : r0 + h, c0 : c0 + w] = np.where(mask[:h, :w], np.nan, array[:h, :w])
    return canvas, scale


def _gray_rgb(canvas):
    """A 2-98 % stretched 8-bit RGB view of a canvas, no-data black (matplotlib then skips its float pipeline)."""
    finite = np.isfinite(canvas)
    lo, hi = np.percentile(canvas[finite], [2, 98]) if finite.any() else (0.0, 1.0)
    gray = np.clip((np.nan_to_num(canvas, nan=lo) - lo) / max(hi - lo, 1e-9), 0.0, 1.0) * 255.0
    gray = np.where(finite, gray, 0.0).astype(np.uint8)
    return np.repeat(gray[:, :, None], 3, axis=2)


def _canvas_positions(detections, tasks, images):
    """Detections' x, y in their image's quick-look canvas (unscaled px)."""
    pieces = pd.DataFrame(
        [(p.path, p.col0, p.row0) for entry in images.values() for p in entry["pieces"]], columns=["path", "c", "r"]
    ).set_index("path")
    paths, ox, oy = _image_offsets(detections, tasks)
    px = pieces.loc[paths, "c"].to_numpy(dtype=float)
    py = pieces.loc[paths, "r"].to_numpy(dtype=float)
    return detections["x_px"].to_numpy(dtype=float) + ox + px, detections["y_px"].to_numpy(dtype=float) + oy + py


def _figure(n, panel_in, polar=False, aspect=None, extra_width_in=0.8):
    """A figure of ``n`` panels whose longer side is ``panel_in`` inches.

    With ``aspect`` (panel height / width, e.g. of the images shown) the panels
    take that shape and the grid gets as many columns as keep the figure
    roughly square, so tall strips stand side by side instead of leaving most
    of a square figure empty. ``extra_width_in`` is room for a colour bar.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if aspect is None:
        ncols = int(min(n, 3 if n > 4 else n if n <= 2 else 2))
        width_in = height_in = panel_in
    else:
        aspect = float(np.clip(aspect, 0.2, 5.0))
        ncols = int(min(n, max(1, math.ceil(math.sqrt(n * aspect)))))
        # 2.5 in at least, so that a tall panel's title still fits
        width_in = max(panel_in / max(aspect, 1.0), 2.5)
        height_in = panel_in * min(aspect, 1.0)
    nrows = -(-n // ncols)
    fig = Figure(figsize=(width_in * ncols + extra_width_in, height_in * nrows + 0.6), dpi=110,
                 layout="constrained")
    FigureCanvasAgg(fig)
    kw = {"projection": "polar"} if polar else {}
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False, subplot_kw=kw)).ravel()
    for ax in axes[n:]:
        ax.set_axis_off()
    return fig, axes[:n]


class _Figures:
    """The quick-look and the rose figures, filled one image's panel at a time.

    Parameters
    ----------
    names : list of str
        All images of the run, sorted; the first ``_MAX_PANELS`` get a panel.
    images : dict
        The plan's images (their pieces give each canvas's size).
    use_azimuth : bool
        Rose of azimuths (georeferenced run) rather than of image directions.
    """

    def __init__(self, names, images, *, use_azimuth):
        self.names = list(names)[:_MAX_PANELS]
        n = len(self.names)
        self.cap = _panel_cap(n)
        self.use_azimuth = use_azimuth
        sizes = [_image_size(images[name]) for name in self.names]
        aspect = float(np.median([h / w for w, h in sizes])) if sizes else 1.0
        self.quick, quick_axes = _figure(n, 9.0 if n == 1 else 4.5, aspect=aspect, extra_width_in=1.5)
        self.rose, rose_axes = _figure(n, 3.6, polar=True)
        self.quick_axes = dict(zip(self.names, quick_axes, strict=True))
        self.rose_axes = dict(zip(self.names, rose_axes, strict=True))
        georefs = [g for name in self.names for g in images[name]["georefs"].values()]
        # Fans are coloured by azimuth where the image is georeferenced, as the rose counts them.
        self.all_azimuth = bool(georefs) and all(g is not None for g in georefs)
        self.some_azimuth = any(g is not None for g in georefs)

    def add(self, name, detections, tasks, images, *, band, nodata, blocks=None):
        """Draw one image's panels (a no-op for images beyond the panel limit)."""
        if name in self.quick_axes:
            _quicklook_panel(self.quick_axes[name], name, detections, tasks, images, self.cap, band=band,
                             nodata=nodata, blocks=blocks)
            _rose_panel(self.rose_axes[name], name, detections, self.use_azimuth)

    def save(self, quicklook_path, rose_path):
        from matplotlib.cm import ScalarMappable
        from matplotlib.colors import Normalize

        from ..plots import DIRECTION_CMAP

        bar = self.quick.colorbar(ScalarMappable(norm=Normalize(0, 360), cmap=DIRECTION_CMAP),
                                  ax=list(self.quick_axes.values()), shrink=0.7, ticks=[0, 90, 180, 270, 360])
        bar.set_label("fan azimuth, degrees clockwise from north" if self.all_azimuth else
                      "fan azimuth (georeferenced images) or direction from image up (others), degrees clockwise"
                      if self.some_azimuth else "fan direction, degrees clockwise from image up", fontsize=7)
        self.rose.suptitle(
            ("fan azimuth, degrees clockwise from north" if self.use_azimuth
             else "fan direction, degrees clockwise from image up") + "; weighted by length", fontsize=8,
        )
        for fig, path in ((self.quick, quicklook_path), (self.rose, rose_path)):
            with atomic_path(path) as tmp:
                fig.savefig(tmp, format="png")


def _panel_georef(entry):
    """The georeferencer of an image's first piece and that piece (None, None when it has no CRS)."""
    piece = entry["pieces"][0]
    georef = entry["georefs"].get(piece.path)
    return (georef, piece) if georef is not None else (None, None)


def _north_deg(georef, col, row):
    """Direction of north in the image at (col, row), degrees clockwise from image up."""
    guess = (-float(georef.grid_to_azimuth(0.0, col, row))) % 360.0
    # One correction step for projections that are not conformal.
    error = (float(georef.grid_to_azimuth(guess, col, row)) + 180.0) % 360.0 - 180.0
    return (guess - error) % 360.0


def _panel_furniture(ax, entry, tasks, canvas, scale, has_detections):
    """Axis units in image px, and for georeferenced images a north arrow and a scale bar."""
    from matplotlib.ticker import FuncFormatter

    from ..plots import add_legend, add_north_arrow, add_scale_bar

    to_px = FuncFormatter(lambda v, _pos: f"{v / scale:.0f}")
    ax.xaxis.set_major_formatter(to_px)
    ax.yaxis.set_major_formatter(to_px)
    ax.set_xlabel("column, px", fontsize=6)
    ax.set_ylabel("row, px", fontsize=6)
    georef, piece = _panel_georef(entry)
    if georef is not None:
        col, row = piece.width / 2 - 0.5, piece.height / 2 - 0.5
        add_north_arrow(ax, _north_deg(georef, col, row))
        metres_per_px = float(georef.ground_length_m(1.0, 90.0, col, row))
        add_scale_bar(ax, metres_per_px / scale, width_units=canvas.shape[1])
    else:
        mpp = [t.metres_per_px for t in tasks if np.isfinite(t.metres_per_px)]
        if mpp:
            add_scale_bar(ax, float(np.median(mpp)) / scale, width_units=canvas.shape[1])
    if has_detections:
        add_legend(ax)


def _quicklook_panel(ax, name, detections, tasks, images, cap, *, band, nodata, blocks=None):
    from ..plots import draw_features

    canvas, scale = _canvas(images[name], band, nodata, cap, blocks)
    ax.imshow(_gray_rgb(canvas), interpolation="nearest")
    title = name
    if not detections.empty:
        cx, cy = _canvas_positions(detections, tasks, images)
        shown = detections.assign(x_px=cx, y_px=cy)
        n_all = len(shown)
        if n_all > _MAX_DRAWN:
            # Matplotlib slows down with many patches; the strongest detections tell the story.
            shown = shown.nlargest(_MAX_DRAWN, "score")
        shown = shown.assign(
            x_px=shown["x_px"] * scale, y_px=shown["y_px"] * scale, length_px=shown["length_px"] * scale,
            semi_major_px=shown["semi_major_px"] * scale, semi_minor_px=shown["semi_minor_px"] * scale,
        )
        color = shown["direction_deg"].to_numpy(dtype=float)
        if "azimuth_deg" in shown.columns:
            azimuth = shown["azimuth_deg"].to_numpy(dtype=float)
            color = np.where(np.isfinite(azimuth), azimuth, color)
        draw_features(ax, shown, linewidth=0.6, as_collection=True, color_deg=color)
        title += f"  ({n_all} detections" + (f", {len(shown)} strongest drawn)" if n_all > len(shown) else ")")
    ax.set_xlim(-0.5, canvas.shape[1] - 0.5)
    ax.set_ylim(canvas.shape[0] - 0.5, -0.5)
    ax.set_title(title + (f"  [1:{1 / scale:.0f}]" if scale < 1 else ""), fontsize=8)
    ax.tick_params(labelsize=6)
    _panel_furniture(ax, images[name], tasks, canvas, scale, not detections.empty)


def _rose_panel(ax, name, detections, use_azimuth):
    edges = np.linspace(0.0, 360.0, _ROSE_BINS + 1)
    fans = detections.loc[detections["kind"] == "fan"]
    angles = fans["azimuth_deg" if use_azimuth else "direction_deg"].to_numpy(dtype=float)
    if use_azimuth and not np.isfinite(angles).all():
        angles = np.where(np.isfinite(angles), angles, fans["direction_deg"].to_numpy(dtype=float))
    weights = np.nan_to_num(fans["length_px"].to_numpy(dtype=float))
    counts, _ = np.histogram(angles % 360.0, bins=edges, weights=weights)
    ax.set_theta_zero_location("N")
    ax.set_theta_direction(-1)
    ax.bar(np.radians(edges[:-1]), counts, width=np.radians(360.0 / _ROSE_BINS), align="edge",
           color="tab:orange", edgecolor="black", linewidth=0.3)
    # In a run mixing georeferenced and plain images, say which panels are not azimuths.
    plain = use_azimuth and len(fans) and not np.isfinite(fans["azimuth_deg"].to_numpy(dtype=float)).any()
    ax.set_title(f"{name} ({len(fans)} fans" + (", from image up)" if plain else ")"), fontsize=8)
    ax.tick_params(labelsize=6)
    ax.set_yticklabels([])


def _write_outputs(stage, tasks, journal, images, *, band, nodata):
    """Write the five outputs into ``stage`` from the journal, one image at a time.

    Only one image's entries and rows are in memory at once, so memory follows
    the largest image's catalog, not the run's.

    Returns
    -------
    totals : dict
        Counts and areas over the whole run for the summary.
    per_image : DataFrame
        See :class:`ScreenSummary`.
    """
    geo = _GeoContext.of(images)
    columns = list(DETECTION_OUTPUT_COLUMNS) + (list(GEO_COLUMNS) if geo.any_georeferenced else [])
    groups = {}
    for index, task in enumerate(tasks):
        groups.setdefault(task.image, []).append(index)
    names = sorted(images)
    figures = _Figures(names, images, use_azimuth="azimuth_deg" in columns)
    totals = dict(n_tiles=0, n_scored=0, n_nodata=0, n_fans=0, n_spots=0, n_deposit_tiles=0, n_smoothed=0,
                  n_resampled=0, n_off_scale=0, area=0.0, covered=0.0)
    records = []

    def image_chunks(tiles_out, detections_out):
        # Each image's rows go to both CSVs, its panels and counts, then its GeoJSON features.
        for k, name in enumerate(names):
            indices = groups.get(name, [])
            image_tasks = [tasks[i] for i in indices]
            entries = [journal.entry(i, tasks[i]) for i in indices]
            # the workers' quick-look samples, when every tile has them (older journals do not)
            blocks = ([(t.path, e["canvas"]) for t, e in zip(image_tasks, entries, strict=True)]
                      if all("canvas" in e for e in entries) else None)
            tiles, detections = _frames(entries, columns)
            del entries
            tiles.to_csv(tiles_out, index=False, header=k == 0)
            detections.to_csv(detections_out, index=False, header=k == 0)
            figures.add(name, detections, image_tasks, {name: images[name]}, band=band, nodata=nodata,
                        blocks=blocks)
            records.append(_per_image(tiles, detections))
            scored = tiles[tiles["route"] != "nodata"]
            totals["n_tiles"] += len(tiles)
            totals["n_scored"] += len(scored)
            totals["n_nodata"] += int((tiles["route"] == "nodata").sum())
            totals["n_fans"] += int((detections["kind"] == "fan").sum())
            totals["n_spots"] += int((detections["kind"] == "spot").sum())
            totals["n_deposit_tiles"] += int((scored["p_deposit"] >= DEPOSIT_THRESHOLD).sum())
            totals["n_smoothed"] += int(smoothed_flags(scored).sum())
            if "read_zoom" in scored:  # journals of earlier versions lack it
                asked = pd.to_numeric(scored["scale_zoom"], errors="coerce").to_numpy(dtype=float)
                read = pd.to_numeric(scored["read_zoom"], errors="coerce").to_numpy(dtype=float)
                totals["n_resampled"] += int(np.sum(read != 1.0))
                totals["n_off_scale"] += int(np.sum((asked != 1.0) & (read == 1.0)))
            totals["area"] += float((scored["width"] * scored["height"]).sum())
            totals["covered"] += float(
                ((scored["fan_cover"] + scored["spot_cover"]) * scored["width"] * scored["height"]).sum())
            _write_gpkg_chunk(stage / _GPKG, name, tiles, detections, image_tasks, images, geo, layers)
            if geo.any_georeferenced:
                yield from _geojson_chunks(detections, image_tasks, geo)

    # The stage folder is moved in only when everything is written, so plain files suffice here.
    layers = set()
    with open(stage / "tiles.csv", "w", encoding="utf-8", newline="") as tiles_out, \
            open(stage / "detections.csv", "w", encoding="utf-8", newline="") as detections_out:
        if geo.any_georeferenced:
            write_geojson_chunks(stage / _GEOJSON, image_chunks(tiles_out, detections_out))
        else:
            # Without any CRS there is no longitude or latitude to write: no GeoJSON (see detector.gis.geojson).
            for _ in image_chunks(tiles_out, detections_out):
                pass
    figures.save(stage / "quicklook.png", stage / "rose.png")
    written = [f for f in _OUTPUT_FILES if (stage / f).exists()]
    coordinates = {_GPKG: geo.describe()}
    if geo.any_georeferenced:
        coordinates[_GEOJSON] = GEOJSON_COORDINATES
    return totals, pd.concat(records, ignore_index=True), {"outputs": written, "coordinates": coordinates}


@dataclass
class ScreenSummary:
    """Headline numbers of a screening run.

    Attributes
    ----------
    out : Path
        The screening folder.
    n_tiles, n_scored, n_nodata : int
        Tiles planned, scored, and routed "nodata".
    n_resumed : int
        Tiles taken from the journal of an earlier, interrupted run.
    n_fans, n_spots : int
    n_deposit_tiles : int
        Scored tiles with ``p_deposit >= DEPOSIT_THRESHOLD``.
    n_smoothed : int
        Scored tiles noisier than every fitting tile of the model, smoothed before detection.
    n_resampled : int
        Scored tiles whose ground scale lay outside the model's and that were read resampled to it.
    n_off_scale : int
        Scored tiles whose ground scale lay outside the model's but that were read as they are
        (without ``at_model_scale``).
    covered_percent : float
        Fan and spot cover over the scored tiles' area, %.
    megapixels : float
        Core pixels screened by this run (resumed tiles excluded), Mpx.
    seconds : float
        Wall time of the whole call, s.
    mpx_per_s : float
        ``megapixels / seconds``.
    workers : int
    per_image : DataFrame
        ``image``, ``tiles``, ``fans``, ``spots``, ``covered_percent``,
        ``dominant_direction_deg``, ``direction_scatter_deg`` and, when
        georeferenced, ``dominant_azimuth_deg``.
    """

    out: Path
    n_tiles: int
    n_scored: int
    n_nodata: int
    n_resumed: int
    n_fans: int
    n_spots: int
    n_deposit_tiles: int
    covered_percent: float
    megapixels: float
    seconds: float
    mpx_per_s: float
    workers: int
    per_image: pd.DataFrame = field(repr=False)
    n_smoothed: int = 0
    n_resampled: int = 0
    n_off_scale: int = 0

    def format(self, *, max_images=12):
        """The one-screen text summary."""
        lines = [
            f"screened {self.n_tiles} tiles ({self.n_scored} scored, {self.n_nodata} no-data"
            + (f", {self.n_resumed} from an earlier run" if self.n_resumed else "")
            + f") of {len(self.per_image)} image(s)",
            f"deposits: {self.n_deposit_tiles} tiles with p_deposit >= {DEPOSIT_THRESHOLD}; "
            f"{self.n_fans} fans, {self.n_spots} spots; covered {self.covered_percent:.2f} % of scored area",
        ]
        if self.n_smoothed:
            lines.append(f"noise: {self.n_smoothed} tile(s) noisier than every tile the model was fitted on were "
                         f"smoothed first and are left to people (tiles.csv: smoothed)")
        if self.n_resampled:
            lines.append(f"scale: {self.n_resampled} tile(s) finer or coarser on the ground than the model's fitting "
                         f"tiles were read resampled to their scale (tiles.csv: read_zoom)")
        if self.n_off_scale:
            lines.append(f"scale: {self.n_off_scale} tile(s) are finer or coarser on the ground than the model's "
                         f"fitting tiles and were read as they are (tiles.csv: scale_zoom); --at-model-scale reads "
                         f"them at the model's scale")
        lines += [
            f"throughput: {self.megapixels:.1f} Mpx in {self.seconds:.1f} s = {self.mpx_per_s:.2f} Mpx/s "
            f"({self.workers} worker{'s' if self.workers != 1 else ''})",
        ]
        width = max([5] + [len(str(n)) for n in self.per_image["image"].head(max_images)])
        lines.append(f"{'image':<{width}}  tiles   fans  spots  cover%  dominant direction (spread)")
        for rec in self.per_image.head(max_images).itertuples(index=False):
            if np.isfinite(rec.dominant_direction_deg):
                d = f"{rec.dominant_direction_deg:6.1f} deg from up ({rec.direction_scatter_deg:.0f})"
                az = getattr(rec, "dominant_azimuth_deg", np.nan)
                if np.isfinite(az):
                    d += f", azimuth {az:.1f} deg"
            else:
                d = "-"
            lines.append(f"{rec.image:<{width}}  {rec.tiles:5d}  {rec.fans:5d}  {rec.spots:5d}  "
                         f"{rec.covered_percent:6.2f}  {d}")
        if len(self.per_image) > max_images:
            lines.append(f"... and {len(self.per_image) - max_images} more image(s): see tiles.csv")
        lines.append(f"outputs in {self.out}")
        return "\n".join(lines)


def _per_image(tiles, detections):
    georef = "azimuth_deg" in detections.columns
    out = []
    for name, group in tiles.groupby("image", sort=True):
        scored = group[group["route"] != "nodata"]
        area = float((scored["width"] * scored["height"]).sum())
        cover = float(((scored["fan_cover"] + scored["spot_cover"]) * scored["width"] * scored["height"]).sum())
        fans = detections[(detections["image"] == name) & (detections["kind"] == "fan")]
        w = fan_direction_weights(fans)
        mean, spread = tile_direction_stats(fans["direction_deg"].to_numpy(dtype=float), w)
        rec = {
            "image": str(name), "tiles": len(group), "fans": len(fans),
            "spots": int(((detections["image"] == name) & (detections["kind"] == "spot")).sum()),
            "covered_percent": 100.0 * cover / area if area else 0.0,
            "dominant_direction_deg": mean, "direction_scatter_deg": spread,
        }
        if georef:
            rec["dominant_azimuth_deg"], _ = tile_direction_stats(fans["azimuth_deg"].to_numpy(dtype=float), w)
        out.append(rec)
    return pd.DataFrame(out)
