"""Screen whole orbital images or tile sets with a model: the ``frostvane screen`` command.

An input is either an image file (any raster GDAL reads: PNG, TIFF / GeoTIFF,
JPEG 2000, ...) or a tile-set folder (one holding ``tiles.csv``). An image is
cut into tiles by :func:`detector.gis.raster.plan_windows`; each tile is read with
an overlap margin, screened with the other tiles of its context block
(:func:`detector.inference.detect.detect_block`), and only
the detections whose apex (fans) or centre (spots) lies in the tile's core are
kept, so no feature is reported twice. A tile-set tile is screened whole and
keeps its ``tile_id``.

The screening folder
--------------------
``tiles.csv``
    One row per tile (see :data:`TILE_COLUMNS`); ``route`` is empty for scored
    tiles (``frostvane effort`` fills it) and ``"nodata"`` for tiles whose
    core is less than half valid, which are not scored. ``area_m2`` is the
    ground area of the tile's core and ``covered_m2`` that of its fan and
    spot cover, m^2 (NaN when the scale is unknown). ``noise_8bit`` is the
    tile's noise (:func:`detector.tile.noise.noise_sigma`, in 8-bit grey
    levels) and ``smoothed`` says it was above the model's fitting tiles' and
    the tile was smoothed before detection (such tiles are unfamiliar). The
    ``unfamiliarity_share_<group>`` columns split the tile's squared
    unfamiliarity distance among the feature groups
    (:func:`detector.inference.unfamiliar.unfamiliarity_parts`; they sum to 1).
``detections.csv``
    :data:`detector.contract.DETECTION_COLUMNS` in tile px, plus ``image``,
    ``col0`` and ``row0`` (image px of the tile's top-left pixel: image px =
    tile px + offset), ``area_m2`` (ground area of the outline, m^2; NaN when
    the scale is unknown) and, for georeferenced rasters, ``lon_deg``,
    ``lat_deg`` (planetocentric, east-positive, [-180, 180)), ``azimuth_deg``
    (degrees clockwise from north at the apex / centre; mod 180 for spots),
    ``wind_from_deg`` (fans) and ``length_m`` (fans).
``detections.gpkg``
    GeoPackage with a ``detections`` layer (fan sectors, spot ellipses, every
    column of detections.csv) and a ``tiles`` layer (tile-core footprints with
    every column of tiles.csv and ``covered_fraction``), in the raster's own
    CRS; images without a CRS in :data:`detector.gis.gpkg.PIXEL_CRS_WKT`. See
    :class:`_GeoContext` for runs mixing CRSs.
``detections.geojson``
    Only when some input is georeferenced: its detections in planetocentric
    longitude / latitude (:data:`GEOJSON_COORDINATES`,
    :func:`detector.gis.geojson.detections_to_geojson`).
``quicklook.png``, ``rose.png``
    A downsampled view of every image with its detections, and the fan
    direction distribution of every image (weighted by length).
``run.json``
    Model hash, inputs, parameters, timing and versions.
``.partial/``
    The journal: one small JSON file per finished tile, written atomically,
    so a run that is interrupted continues where it stopped when it is started
    again with the same arguments. Final outputs are written from it in a
    fixed order (image, row0, col0), one image at a time: the run keeps no
    tile results in memory, so memory follows the largest image's catalog,
    not the number of tiles or images.

Work runs serially, in local processes (``workers``, joblib's loky backend) or
on a running Dask distributed cluster (``scheduler``). Every worker loads the
model once and reads its own windows from the image files, so no pixel array
travels between processes.
"""

import contextlib
import math
import os
import platform
import time
from dataclasses import replace
from pathlib import Path

from ..inference.model import cached_model
from ..errors import DetectorError
from ..io import write_json
from .folder import _RUN_FILE
from .journal import _claim, _finite, _Journal, _mark_failed, _parameters, _version
from .outputs import _write_outputs, ScreenSummary
from .plan import _plan
from ..objects.context import context_blocks
from .workers import _check_workers, _progress, _run_dask, _run_loky, _run_serial

__all__ = ["screen"]


def screen(model_dir, inputs, out, *, tile=(800, 600), overlap=32, workers=1, scheduler=None, nodata=None,
           band=None, min_score=None, progress=True, any_body=False, force=False, at_model_scale=False):
    """Screen images or tile sets with a model and write the screening folder.

    Parameters
    ----------
    model_dir : path-like
        Model folder (see :func:`detector.inference.model.load_model`; its hashes are checked).
    inputs : path-like or list of path-like
        Image files and / or tile-set folders (with ``tiles.csv``).
    out : path-like
        Screening folder; created, or continued when it holds an interrupted
        run with the same parameters.
    tile : (int, int), optional
        Core tile size (width, height) for image inputs, px.
    overlap : int, optional
        Margin read around each tile, px.
    workers : int, optional
        Local worker processes (joblib loky backend) when above 1.
    scheduler : str, optional
        Address of a running Dask distributed scheduler (e.g.
        ``"tcp://10.0.0.5:8786"``); overrides ``workers``.
    nodata : float or str, optional
        Value of no-data pixels; ``"none"`` (or NaN) when no value is (NaN
        pixels of float images always are); default the raster's own, else 0
        (see :func:`detector.gis.raster.nodata_value`).
    band : int, optional
        1-based band; required for multi-band images.
    min_score : float, optional
        Smallest detection score kept; default the model card's.
    progress : bool, optional
        Show a tqdm progress bar over tiles.
    any_body : bool, default=False
        Accept rasters whose CRS is not on Mars (otherwise refused, see
        :func:`detector.gis.geo.check_mars_crs`).
    force : bool, default=False
        Delete whatever ``out`` holds (another run, an unfinished one, other
        files) once the inputs are checked, and screen from scratch.
    at_model_scale : bool, default=False
        Read each tile whose ground scale (``metres_per_px`` of a tile set, or a projected
        raster's pixel size) lies outside the model's fitting tiles' resampled to it
        (:mod:`detector.tile.scale`); by default every tile is read as it is and such tiles
        are only counted (``scale_zoom`` in ``tiles.csv``).

    Returns
    -------
    summary : ScreenSummary

    Raises
    ------
    DetectorError
        Unreadable or corrupt image, multi-band image without ``band``,
        missing or tampered model file, or ``out`` holding another run. The
        final outputs are written only once every tile is done.
    """
    t_start = time.perf_counter()
    workers = _check_workers(workers)
    nodata = _nodata_key(nodata)
    model_dir = Path(model_dir)
    patch_px = cached_model(model_dir).feature_spec.patch_px  # a bad model fails here, before any write
    width, height = (int(v) for v in tile)
    if min(width, height) < patch_px:
        raise DetectorError(f"tile {width}x{height} px is smaller than the model's {patch_px} px patch: such tiles "
                            f"hold no whole patch and would be screened as empty; use --tile of at least "
                            f"{patch_px}x{patch_px} (the default is 800x600).")
    tasks, images = _plan(inputs, tile=tile, overlap=overlap, nodata=nodata, band=band, any_body=any_body,
                          min_side=patch_px)
    if at_model_scale:
        tasks = [replace(t, at_model_scale=True) for t in tasks]
    inputs = [inputs] if isinstance(inputs, (str, os.PathLike)) else list(inputs)
    params = _parameters(model_dir, inputs, tile=tile, overlap=overlap, nodata=nodata, band=band,
                         at_model_scale=at_model_scale)
    out = Path(out)
    if force and out.is_dir():
        import shutil

        shutil.rmtree(out)
    record = _claim(out, params)
    try:
        journal = _Journal(out)
        run = _run_tiles(journal, tasks, model_dir, min_score=min_score, workers=workers, scheduler=scheduler,
                         progress=progress)
        with _staged(out) as stage:
            totals, per_image, written = _write_outputs(stage, tasks, journal, images, band=band, nodata=nodata)
    except (DetectorError, OSError) as err:
        # Recorded so that a corrected rerun into this folder is not taken for another live run.
        _mark_failed(out, record, err)
        raise
    summary = _summary(out, run, totals, per_image, time.perf_counter() - t_start, workers)
    write_json(out / _RUN_FILE, _finite(_run_record(record, params, summary, run, scheduler, min_score, written)),
               end="\n")
    return summary


def _nodata_key(nodata):
    """The ``--nodata`` value as the planner and the per-process raster cache take it (NaN is no key: 'none')."""
    if nodata is not None:
        from ..gis.raster import nodata_value

        nodata = nodata_value(nodata)
        nodata = "none" if math.isnan(nodata) else nodata  # NaN is no key for the per-process raster cache
    return nodata


def _run_tiles(journal, tasks, model_dir, *, min_score, workers, scheduler, progress):
    """Screen the tiles the journal does not hold yet, serially, in local processes or on a Dask cluster.

    Parameters
    ----------
    journal : _Journal
        Each finished tile is written to it at once and not kept.
    tasks : list of _TileTask
    model_dir : Path
    min_score : float or None
    workers : int
    scheduler : str or None
    progress : bool

    Returns
    -------
    run : dict
        ``n_resumed``, ``n_computed`` (tiles), ``pixels`` screened now, ``tile_seconds`` and ``workers``
        (the Dask cluster's count when one ran the tiles, else None).
    """
    journal.sweep()
    finished = journal.finished(tasks)
    n_resumed = len(finished)
    n_todo = len(tasks) - n_resumed
    # A tile is read with the other tiles of its context block; a block with a tile left to do is
    # read whole again (its finished tiles come out the same and are not written twice).
    blocks = context_blocks([t.image for t in tasks], [t.row0 for t in tasks], [t.col0 for t in tasks],
                            [t.width for t in tasks], [t.height for t in tasks])
    todo = [[(i, tasks[i]) for i in block] for block in blocks if any(i not in finished for i in block)]
    model_arg = str(model_dir.resolve())
    cluster = {}  # the Dask run says how many workers it had
    if scheduler:
        results = _run_dask(todo, model_arg, min_score, scheduler, info=cluster)
    elif workers > 1 and len(todo) > 1:
        results = _run_loky(todo, model_arg, min_score, workers)
    else:
        results = _run_serial(todo, model_arg, min_score)
    pixels = 0
    t_tiles = time.perf_counter()
    with _progress(len(tasks), n_resumed, progress) as bar, contextlib.closing(results):
        for index, entry in results:
            if index in finished:
                continue
            journal.write(index, entry)  # the entry is not kept: the outputs read the journal
            pixels += entry["pixels"]
            bar.update(1)
    t_tiles = time.perf_counter() - t_tiles
    return {"n_resumed": n_resumed, "n_computed": n_todo, "pixels": pixels, "tile_seconds": t_tiles,
            "workers": cluster.get("workers")}


def _summary(out, run, totals, per_image, seconds, workers):
    """The run's :class:`ScreenSummary` from the tile loop's figures and the outputs' totals."""
    pixels = run["pixels"]
    area, covered = totals.pop("area"), totals.pop("covered")
    return ScreenSummary(
        out=out,
        n_resumed=run["n_resumed"],
        covered_percent=100.0 * covered / area if area else 0.0,
        megapixels=pixels / 1e6,
        seconds=seconds,
        mpx_per_s=pixels / 1e6 / seconds if seconds > 0 else math.nan,
        workers=run["workers"] if run["workers"] is not None else workers,
        per_image=per_image,
        **totals,
    )


def _run_record(record, params, summary, run, scheduler, min_score, written):
    """``run.json`` of a complete run: the claim's record, parameters, versions, timing, counts, outputs."""
    return {
        **{k: v for k, v in record.items() if k != "error"},
        "status": "complete",
        "parameters": params,
        "version": _version(),
        "run": {
            "workers": summary.workers, "scheduler": scheduler, "min_score": min_score,
            "python": platform.python_version(),
            "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        },
        "timing": {"seconds": summary.seconds, "tile_seconds": run["tile_seconds"],
                   "megapixels": run["pixels"] / 1e6, "mpx_per_s": summary.mpx_per_s,
                   "tiles_resumed": run["n_resumed"], "tiles_computed": run["n_computed"]},
        "counts": {k: getattr(summary, k)
                   for k in ("n_tiles", "n_scored", "n_nodata", "n_fans", "n_spots", "n_deposit_tiles",
                             "n_smoothed", "n_resampled", "n_off_scale")},
        **written,
    }


@contextlib.contextmanager
def _staged(out):
    """A hidden folder in ``out`` for the final outputs; they are moved in only when all are written."""
    import shutil
    import tempfile

    stage = Path(tempfile.mkdtemp(prefix=".outputs.", dir=out))
    try:
        yield stage
        for name in sorted(os.listdir(stage)):
            os.replace(stage / name, out / name)
    finally:
        shutil.rmtree(stage, ignore_errors=True)
