"""The screening journal: the run record, claiming an output folder, one JSON per finished tile (``.partial/``)."""

import contextlib
import json
import math
import os
import time
from pathlib import Path

from ..contract import TILES_FILE
from ..errors import DetectorError
from ..io import atomic_path, write_json
from .folder import _JOURNAL, _RUN_FILE

__all__ = []  # private to detector.screening


class _Journal:
    """One JSON file per finished tile in ``out/.partial``, named by the tile's place in the plan."""

    def __init__(self, out):
        self.folder = Path(out) / _JOURNAL

    def _path(self, index):
        return self.folder / f"{index:07d}.json"

    def sweep(self):
        """Remove temporary files an interrupted run left behind (a killed write never renamed)."""
        if self.folder.is_dir():
            for stale in self.folder.glob(".*.tmp*"):
                stale.unlink(missing_ok=True)

    def write(self, index, entry):
        self.folder.mkdir(parents=True, exist_ok=True)
        with atomic_path(self._path(index)) as tmp:
            with open(tmp, "w", encoding="utf-8") as handle:
                json.dump(entry, handle)
                handle.flush()
                os.fsync(handle.fileno())

    def _checked(self, index, task):
        """The entry of ``task`` at plan index ``index``; None when missing, unreadable or of another tile."""
        try:
            entry = json.loads(self._path(index).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        return entry if entry.get("tile_id") == task.tile_id else None

    def entry(self, index, task):
        """The entry of ``task`` at plan index ``index``; an error when it is missing or damaged."""
        entry = self._checked(index, task)
        if entry is None:
            raise DetectorError(
                f"journal entry {str(self._path(index))!r} of tile {task.tile_id!r} is missing or damaged; "
                f"run the same command again to recompute it."
            )
        return entry

    def finished(self, tasks):
        """Plan indices whose entry is already in the journal; others (missing, unreadable, of
        another tile) are computed again.

        Entries are checked, not kept: the outputs read them again one image at a
        time, so memory does not follow the number of tiles.
        """
        if not self.folder.is_dir():
            return set()
        return {index for index, task in enumerate(tasks) if self._checked(index, task) is not None}


def _version():
    try:
        from importlib.metadata import version

        return version("frostvane")
    except Exception:  # not installed as a distribution (e.g. run from a source tree)
        return "unknown"


def _parameters(model_dir, inputs, *, tile, overlap, nodata, band, at_model_scale=False):
    from ..inference.model import MODEL_CARD, sha256_file

    return {
        "model_dir": str(Path(model_dir).resolve()),
        "model_hash": sha256_file(Path(model_dir) / MODEL_CARD),
        "inputs": [str(Path(p).resolve()) for p in inputs],
        "input_stamps": [_stamp(p) for p in inputs],
        "tile": [int(tile[0]), int(tile[1])],
        "overlap": int(overlap),
        "nodata": _nodata_record(nodata),
        "band": None if band is None else int(band),
        # only when asked, so that folders of runs without it keep their parameters
        **({"at_model_scale": True} if at_model_scale else {}),
    }


def _nodata_record(nodata):
    """The no-data choice as JSON can hold it: null (the raster's own, else 0), "none", or a number."""
    from ..gis.raster import nodata_value

    if nodata is None:
        return None
    value = nodata_value(nodata)
    return "none" if math.isnan(value) else value


def _stamp(path):
    """Size and modification time of an input (of its tiles.csv for a tile set): a replaced input is another run."""
    path = Path(path)
    target = path / TILES_FILE if path.is_dir() else path
    st = target.stat()
    return [int(st.st_size), int(st.st_mtime_ns)]


def _mark_failed(out, record, err):
    """Set run.json's status to "failed" with the reason (best effort: the disk may be full)."""
    with contextlib.suppress(OSError, ValueError, TypeError):
        write_json(Path(out) / _RUN_FILE, _finite({**record, "status": "failed", "error": str(err)[:500]}), end="\n")


def _sweep_stale_outputs(out):
    """Remove hidden output stages a killed run left in ``out`` (they are never moved in)."""
    import shutil

    for stale in Path(out).glob(".outputs.*"):
        if stale.is_dir():
            shutil.rmtree(stale, ignore_errors=True)


def _claim(out, params):
    """Make ``out`` this run's folder, or find that it already is; refuse a folder of another run."""
    out = Path(out)
    run_file = out / _RUN_FILE
    if out.exists() and not out.is_dir():
        raise DetectorError(f"output {str(out)!r} exists and is not a folder.")
    if run_file.is_file():
        try:
            previous = json.loads(run_file.read_text(encoding="utf-8"))
        except (OSError, ValueError) as err:
            raise DetectorError(f"{str(run_file)!r} is not a readable run record: {err}.") from err
        if not isinstance(previous, dict) or not isinstance(previous.get("parameters", {}), dict):
            raise DetectorError(
                f"{str(run_file)!r} is not a run record (a JSON object with 'parameters'); "
                f"choose another --out or delete the folder."
            )
        _sweep_stale_outputs(out)
        old = previous.get("parameters", {})
        differ = [k for k in params if k != "model_dir" and old.get(k) != params[k]]
        if differ and previous.get("status") == "failed":
            # A run that failed (bad input, full disk) is not resumed with other inputs: start afresh.
            import shutil

            shutil.rmtree(out / _JOURNAL, ignore_errors=True)
            record = {"status": "running", "parameters": params, "version": _version(),
                      "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
            write_json(run_file, record, end="\n")
            return record
        if differ:
            what = ", ".join(f"{k} {old.get(k)!r} -> {params[k]!r}" for k in differ)
            raise DetectorError(
                f"output folder {str(out)!r} holds another screening run ({what}); "
                f"choose another --out or delete it."
            )
        return previous
    if out.is_dir() and any(out.iterdir()):
        raise DetectorError(
            f"output folder {str(out)!r} is not empty and holds no {_RUN_FILE}; choose a new or empty folder."
        )
    record = {"status": "running", "parameters": params, "version": _version(),
              "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
    write_json(run_file, record, end="\n")
    return record


def _finite(obj):
    """NaN / inf to None, so the record is valid JSON."""
    if isinstance(obj, dict):
        return {k: _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj
