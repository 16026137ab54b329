"""Bad and edge-case inputs against every frostvane command, each outcome classified.

Builds one small valid baseline in a temporary folder (``frostvane synth``, 2 images x 2 tiles, and
its screening with the shipped ``models/demo``), derives well over a hundred damaged inputs from it
(tile-set tables, images, pixel types, model cards, screening folders, options, output folders), runs
the command line on each (a subprocess with a timeout, ``--workers 1``) and sorts every outcome:

- ``clear error``: exit 2, no traceback, nothing half-written, and stderr (argparse's usage lines
  aside) is one ``frostvane...: error:`` line per problem (``validate`` lists every breach of a tile
  set at once; any other bad input gives one line) naming what the case expects (the file, row,
  column or value);
- ``handled``: exit 0 on an input the contract supports (the case says why; some cases also check
  the result, e.g. an int16 image screens exactly like the same numbers in uint16);
- ``traceback``: "Traceback" in the output, an exit code other than 0 and 2, or a timeout;
- ``silent``: exit 0 where an error was due, or a handled case whose result check failed;
- ``unclear error``: exit 2 with a stderr line that is not an error line, or nothing naming what it
  should;
- ``half-written``: after an error, the output folder holds outputs it did not hold before, a
  ``run.json`` still "running" or a hidden ``.outputs.*`` stage, or a folder the command was only
  to read (a screening under ``effort``) was changed.

    PYTHONPATH=. .venv/bin/python tests/benchmarks/bad_inputs.py --out out/bad_inputs [--only screen]

Prints one table per command and the totals, writes ``bad_inputs.csv`` (case, command, expected,
outcome, exit code, first stderr line) and ``bad_inputs.json`` (the totals) to ``--out``, and exits
1 when any outcome is a traceback, silent, unclear or half-written. About 12 minutes on two shared
cores, 1-3 of them for the one small training run. Every read-only case runs as user ``nobody`` when started as root (root ignores permissions).
"""

import argparse
import csv
import hashlib
import json
import os
import shutil
import struct
import subprocess
import sys
import tempfile
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[2]
MODEL = ROOT / "models" / "demo"
BAD = ("traceback", "silent", "unclear error", "half-written")
OUTCOMES = ("clear error", "handled") + BAD


# ----------------------------------------------------------------------------- running


def _cli_module():
    """The module of the ``frostvane`` console script, as pyproject.toml declares it."""
    import tomllib

    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]["scripts"]
    return scripts["frostvane"].split(":")[0]


CLI_MODULE = _cli_module()


def frostvane(argv, *, timeout=240, as_nobody=False, env_extra=None):
    """Run ``frostvane ARGV`` from this source tree; return (exit code, stdout, stderr, seconds)."""
    env = {**os.environ, "PYTHONPATH": str(ROOT), **(env_extra or {})}
    cmd = [sys.executable, "-m", CLI_MODULE, *map(str, argv)]
    if as_nobody:
        cmd = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", *cmd]
    started = time.perf_counter()
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env, cwd=ROOT)
        return proc.returncode, proc.stdout, proc.stderr, time.perf_counter() - started
    except subprocess.TimeoutExpired as err:
        out = err.stdout.decode() if isinstance(err.stdout, bytes) else (err.stdout or "")
        return None, out, f"timeout after {timeout} s", time.perf_counter() - started


def error_lines(stderr):
    """The stderr lines a user reads as the error: argparse's usage block and blank lines dropped."""
    lines, in_usage = [], False
    for line in stderr.splitlines():
        if not line.strip() or line.startswith("frostvane: compiling"):
            continue  # a fresh machine announces its first compilation once
        if line.startswith("usage: "):
            in_usage = True
            continue
        if in_usage and line.startswith(" "):
            continue
        in_usage = False
        lines.append(line)
    return lines


def snapshot(folder):
    """Every file under ``folder`` (hidden ones too) with its size and sha1; {} if it does not exist."""
    folder = Path(folder)
    if not folder.is_dir():
        return {}
    files = {}
    for path in sorted(folder.rglob("*")):
        if path.is_file():
            files[str(path.relative_to(folder))] = (path.stat().st_size, hashlib.sha1(path.read_bytes()).hexdigest())
        elif path.is_dir():
            files[str(path.relative_to(folder)) + "/"] = (0, "")
    return files


def half_written(folder, before):
    """What an error left in ``folder`` compared with ``before`` (empty list: nothing)."""
    folder = Path(folder)
    after = snapshot(folder)
    found = [f"hidden stage {name}" for name in after if name.split("/")[0].startswith(".outputs.")]
    run = folder / "run.json"
    if run.is_file():
        try:
            status = json.loads(run.read_text()).get("status")
        except (ValueError, AttributeError):
            status = None
        if status == "running" and before.get("run.json") != after.get("run.json"):
            found.append("run.json left 'running'")
    for name, stamp in after.items():
        top = name.split("/")[0]
        if top in ("run.json", ".partial") or top.startswith(".outputs."):
            continue  # the failed run's record and its resumable journal are the contract
        if before.get(name) != stamp:
            found.append(f"{'changed' if name in before else 'new'} {name}")
    found += [f"removed {name}" for name in before if name not in after and not name.startswith(".partial")]
    return found


def _plain(text):
    """Lower case, '-' read as '_': an option and the value it sets name the same thing."""
    return text.lower().replace("-", "_")


@dataclass
class Case:
    """One input, the command that gets it and what must happen."""

    name: str
    command: str
    build: object  # (ctx, folder) -> dict(argv=[...], watch=[folders], nobody=bool)
    expected: str = "error"  # "error", "handled" or "either"
    names: tuple = ()  # substrings the error line must hold (case-insensitive)
    check: object = None  # (ctx, folder) -> "" if the handled result is right, else what is wrong
    note: str = ""
    timeout: int = 240
    result: dict = field(default_factory=dict)


def run_case(ctx, case, folder):
    spec = case.build(ctx, folder)
    watch = [Path(w) for w in spec.get("watch", [])]
    before = {w: snapshot(w) for w in watch}
    code, out, err, seconds = frostvane(spec["argv"], timeout=case.timeout, as_nobody=spec.get("nobody", False),
                                        env_extra=spec.get("env"))
    err = err.replace(str(ctx.root), "$TMP")  # shorter lines; the CSV keeps them comparable between runs
    lines = error_lines(err)
    first = lines[0] if lines else ""
    detail = ""
    if code is None or code not in (0, 2) or "Traceback" in out + err:
        outcome = "traceback"
        tb = [ln for ln in err.splitlines() if ln.strip()]
        detail = tb[-1] if tb else f"exit {code}"
    elif code == 2:
        left = [item for w in watch for item in half_written(w, before[w])]
        said = _plain("\n".join(lines))
        missing = [s for s in case.names if _plain(s) not in said]
        stray = [ln for ln in lines if not ln.startswith("frostvane") or "error:" not in ln]
        if left:
            outcome, detail = "half-written", "; ".join(left[:4])
        elif not lines or stray or missing:
            outcome = "unclear error"
            detail = f"not an error line: {stray[0][:120]!r}" if stray else f"does not name {missing}"
        else:
            outcome = "clear error"
            detail = f"{len(lines)} lines, one per problem" if len(lines) > 1 else ""
    elif case.expected == "error":
        outcome, detail = "silent", "exit 0"
    else:
        wrong = case.check(ctx, folder) if case.check else ""
        outcome, detail = ("silent", wrong) if wrong else ("handled", case.note)
    case.result = {"case": case.name, "command": case.command, "expected": case.expected, "outcome": outcome,
                   "exit_code": "" if code is None else code, "stderr_lines": len(lines),
                   "stderr_first_line": first or detail,
                   "detail": detail, "seconds": round(seconds, 1),
                   "argv": " ".join(str(a) for a in spec["argv"]).replace(str(ctx.root), "$TMP")}
    return case.result


# ----------------------------------------------------------------------------- inputs


class Context:
    """The valid baseline every case is derived from."""

    def __init__(self, root):
        self.root = root
        self.syn = root / "syn"
        self.syn3 = root / "syn3"  # the fewest images training splits (fit, calibration, held out)
        self.syn7 = root / "syn7"  # the fewest the labelling-order study splits
        self.screening = root / "screening"
        self.tile_png = self.syn / "images" / "SYN_0001_C_T00.png"
        self.nobody = os.geteuid() == 0 and shutil.which("setpriv") is not None

    def prepare(self):
        steps = [
            ["synth", self.syn, "--images", 2, "--tiles-per-image", 2, "--seed", 3],
            ["synth", self.syn3, "--images", 3, "--tiles-per-image", 1, "--seed", 4],
            ["synth", self.syn7, "--images", 7, "--tiles-per-image", 1, "--seed", 5],
            ["screen", MODEL, self.syn, "--out", self.screening, "--workers", 1],
        ]
        for argv in steps:
            code, out, err, seconds = frostvane(argv, timeout=900)
            if code != 0:
                sys.exit(f"baseline step {argv[0]} failed (exit {code}):\n{err}")
            print(f"baseline: frostvane {argv[0]} in {seconds:.0f} s", file=sys.stderr)
        self.pixels = np.asarray(_pil().open(self.tile_png))


def _pil():
    from PIL import Image

    return Image


def read_table(path):
    return pd.read_csv(path, dtype=str, keep_default_na=False)


def tileset(ctx, folder, *, tiles=None, consensus=None, tiles_text=None, consensus_text=None, image=None,
            suffix=".png", drop=(), source=None):
    """A copy of a baseline tile set (default: the 2 x 2 one) with its tables or its first tile's image replaced."""
    ts = folder / "ts"
    shutil.copytree(source or ctx.syn, ts)
    for name in drop:
        (ts / name).unlink()
    if image is not None:
        target = ts / "images" / f"BAD_T00{suffix}"
        image(target)
        table = read_table(ts / "tiles.csv")
        (ts / table.loc[0, "path"]).unlink()
        table.loc[0, "path"] = f"images/{target.name}"
        table.to_csv(ts / "tiles.csv", index=False)
    for name, edit, text in (("tiles.csv", tiles, tiles_text), ("consensus.csv", consensus, consensus_text)):
        if text is not None:
            (ts / name).write_bytes(text if isinstance(text, bytes) else text.encode())
        elif edit is not None:
            edit(read_table(ts / name)).to_csv(ts / name, index=False)
    return ts


def set_cell(row, column, value):
    def edit(df):
        df.loc[row, column] = value
        return df
    return edit


def set_first(kind, column, value):
    """Set ``column`` of the first consensus row of ``kind``."""
    def edit(df):
        df.loc[df.index[df["kind"] == kind][0], column] = value
        return df
    return edit


def drop_column(column):
    return lambda df: df.drop(columns=[column])


def model_copy(folder, *, card=None, card_text=None, files=None):
    """A copy of the shipped model with its card edited (a dict function) or its files changed."""
    model = folder / "model"
    shutil.copytree(MODEL, model)
    if files:
        files(model)
    if card_text is not None:
        (model / "model.json").write_text(card_text)
    elif card is not None:
        data = json.loads((model / "model.json").read_text())
        card(data)
        (model / "model.json").write_text(json.dumps(data, indent=1))  # NaN stays a JSON NaN literal
    return model


def screening_copy(ctx, folder, *, tiles=None, tiles_text=None, run=None, run_text=None, drop=()):
    scr = folder / "screening"
    shutil.copytree(ctx.screening, scr)
    for name in drop:
        (scr / name).unlink()
    if tiles_text is not None:
        (scr / "tiles.csv").write_text(tiles_text)
    elif tiles is not None:
        tiles(read_table(scr / "tiles.csv")).to_csv(scr / "tiles.csv", index=False)
    if run_text is not None:
        (scr / "run.json").write_text(run_text)
    elif run is not None:
        data = json.loads((scr / "run.json").read_text())
        run(data)
        (scr / "run.json").write_text(json.dumps(data))
    return scr


# images: each writer takes the target path


def png(mode, array):
    def write(path):
        _pil().fromarray(np.ascontiguousarray(array), mode=mode).save(path) if mode else \
            _pil().fromarray(np.ascontiguousarray(array)).save(path)
    return write


def tiff(array, **kw):
    def write(path):
        import tifffile

        tifffile.imwrite(path, array, **kw)
    return write


def geotiff(array, crs, *, nodata=None):
    def write(path):
        import rasterio
        from rasterio.transform import from_origin

        bands = array[None] if array.ndim == 2 else array
        profile = {"driver": "GTiff", "width": bands.shape[2], "height": bands.shape[1], "count": bands.shape[0],
                   "dtype": bands.dtype.name, "crs": crs, "transform": from_origin(-120000, 80000, 0.5, 0.5)}
        if nodata is not None:
            profile["nodata"] = nodata
        with rasterio.open(path, "w", **profile) as dst:
            dst.write(bands)
    return write


def raw(data):
    return lambda path: path.write_bytes(data)


def truncated(source, share):
    return lambda path: path.write_bytes(source.read_bytes()[: int(source.stat().st_size * share)])


def corrupted(source):
    def write(path):
        data = bytearray(source.read_bytes())
        middle = len(data) // 2
        data[middle:middle + 64] = bytes(255 - b for b in data[middle:middle + 64])
        path.write_bytes(bytes(data))
    return write


def png_bomb(width, height):
    """A valid grey PNG of ``width`` x ``height`` zeros: a few hundred kB that decode to width*height bytes."""
    def write(path):
        def chunk(kind, data):
            return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)
        packer, row, parts = zlib.compressobj(9), b"\x00" * (width + 1), []
        for _ in range(height):
            parts.append(packer.compress(row))
        parts.append(packer.flush())
        path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0))
                         + chunk(b"IDAT", b"".join(parts)) + chunk(b"IEND", b""))
    return write


def sparse_tiff(width, height):
    """A tiled, deflate-compressed TIFF of ``width`` x ``height`` whose blocks are never written (a few kB)."""
    def write(path):
        import warnings

        import rasterio

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # no georeferencing: a plain tile
            with rasterio.open(path, "w", driver="GTiff", width=width, height=height, count=1, dtype="uint8",
                               tiled=True, blockxsize=512, blockysize=512, compress="deflate", SPARSE_OK="TRUE"):
                pass
    return write


MARS_PS = ("+proj=stere +lat_0=-90 +lon_0=0 +k=1 +x_0=0 +y_0=0 +R=3396190 +units=m +no_defs")


# ----------------------------------------------------------------------------- cases


def _ts_case(command, name, extra=(), **kw):
    """A tile-set case for ``validate``/``evaluate``/``train``/``winds``: edit a copy, run the command on it."""
    names = kw.pop("names", ())
    expected = kw.pop("expected", "error")
    note = kw.pop("note", "")
    check = kw.pop("check", None)
    timeout = kw.pop("timeout", 240)
    source = kw.pop("source", "syn3" if command == "train" else "syn")

    def build(ctx, d):
        ts = tileset(ctx, d, source=getattr(ctx, source), **kw)
        out = d / "out"
        argv = {
            "validate": ["validate", ts],
            "evaluate": ["evaluate", MODEL, ts, "--out", out, "--workers", 1],
            "train": ["train", ts, "--out", out, "--max-patches", 20000, "--workers", 1],
            "winds": ["winds", "--crowd", ts, "--out", out, "--bootstrap", 100, "--bootstrap-modes", 100],
            "screen": ["screen", MODEL, ts, "--out", out, "--workers", 1],
            "backtest": ["backtest", MODEL, ts, "--out", out, "--workers", 1],
        }[command]
        return {"argv": [*argv, *extra], "watch": [out]}
    return Case(name, command, build, expected, names, check, note, timeout)


def _image_case(command, name, writer, suffix=".png", extra=(), **kw):
    """An image case: ``validate`` gets it as a tile of the tile set, ``screen`` as an image file."""
    names = kw.pop("names", ("BAD_T00",))
    expected = kw.pop("expected", "error")

    def build(ctx, d):
        out = d / "out"
        if command == "validate":
            # The first tile's consensus goes with its image: the image is then the only breach.
            ts = tileset(ctx, d, image=writer, suffix=suffix,
                         consensus=lambda df: df[df["tile_id"] != read_table(ctx.syn / "tiles.csv")["tile_id"][0]])
            return {"argv": ["validate", ts, *extra]}
        image = d / f"BAD_T00{suffix}"
        writer(image)
        return {"argv": ["screen", MODEL, image, "--out", out, "--workers", 1, *extra], "watch": [out]}
    return Case(name, command, build, expected, names, kw.pop("check", None), kw.pop("note", ""))


def _same_screening_as(reference_writer, suffix):
    """Check of a handled image: its screening equals that of the reference image (same numbers, uint16)."""
    def check(ctx, d):
        ref_img = d / f"REF{suffix}"
        reference_writer(ref_img)
        code, _, err, _ = frostvane(["screen", MODEL, ref_img, "--out", d / "ref", "--workers", 1])
        if code != 0:
            return f"reference screening failed: {err.strip()[-200:]}"
        for name in ("tiles.csv", "detections.csv"):
            a = pd.read_csv(d / "out" / name).drop(columns=["tile_id", "image"], errors="ignore")
            b = pd.read_csv(d / "ref" / name).drop(columns=["tile_id", "image"], errors="ignore")
            if not a.equals(b):
                return f"{name} differs from the same numbers stored as uint16"
        return ""
    return check


def _some_nodata(ctx, d):
    """'' when the screened tile counts some pixels as no-data (valid_fraction below 1)."""
    valid = pd.read_csv(d / "out" / "tiles.csv")["valid_fraction"]
    return "" if (valid < 1).all() else f"valid_fraction {valid.tolist()}: the inf pixels were read as data"


def _first_tile_crowd(ctx, d):
    """'' when effort routed the screening's first tile to the crowd."""
    routes = pd.read_csv(d / "screening" / "routes.csv", dtype=str, keep_default_na=False)
    first = read_table(ctx.screening / "tiles.csv")["tile_id"][0]
    route = routes.loc[routes["tile_id"] == first, "route"].tolist()
    return "" if route == ["crowd"] else f"tile {first} routed {route}"


def _model_case(command, name, *, card=None, card_text=None, files=None, names=(), expected="error", note=""):
    def build(ctx, d):
        model = model_copy(d, card=card, card_text=card_text, files=files)
        out = d / "out"
        if command == "screen":
            return {"argv": ["screen", model, ctx.tile_png, "--out", out, "--workers", 1], "watch": [out]}
        if command == "evaluate":
            return {"argv": ["evaluate", model, ctx.syn, "--out", out, "--workers", 1], "watch": [out]}
        # The screening names the edited card's hash, so that the card's own damage is what effort meets.
        scr = screening_copy(ctx, d, run=lambda r: r["parameters"].__setitem__(
            "model_hash", hashlib.sha256((model / "model.json").read_bytes()).hexdigest()))
        return {"argv": ["effort", model, scr, "--out", out], "watch": [out, scr]}
    return Case(name, command, build, expected, names, None, note)


def _effort_case(name, *, extra=(), names=(), expected="error", note="", files=None, check=None, **kw):
    def build(ctx, d):
        scr = screening_copy(ctx, d, **kw)
        if files:
            files(ctx, d)
        argv = ["effort", MODEL, scr, *[a(ctx, d) if callable(a) else a for a in extra]]
        return {"argv": argv, "watch": [] if expected == "handled" else [scr]}
    return Case(name, "effort", build, expected, names, check, note)


def _argv_case(command, name, argv, *, names=(), expected="error", note="", watch=(), prep=None, nobody=False,
               check=None, timeout=240):
    """A case given as a command line; ``argv`` items may be callables of (ctx, folder)."""
    def build(ctx, d):
        if prep:
            prep(ctx, d)
        return {"argv": [a(ctx, d) if callable(a) else a for a in argv],
                "watch": [w(ctx, d) for w in watch], "nobody": nobody and ctx.nobody,
                "env": {"MPLCONFIGDIR": str(d / "mpl"), "HOME": str(d / "home")} if nobody and ctx.nobody else None}
    return Case(name, command, build, expected, names, check, note, timeout)


def _ro_folder(ctx, d):
    """A read-only folder (the parent of an --out), and writable scratch for the user ``nobody``."""
    for sub in ("mpl", "home"):
        (d / sub).mkdir()
        os.chmod(d / sub, 0o777)
    (d / "ro").mkdir()
    os.chmod(d / "ro", 0o555)


def _json_strict(path):
    """'' when ``path`` is strict JSON (no NaN / Infinity), else the problem."""
    def bad(token):
        raise ValueError(f"non-standard JSON token {token}")
    try:
        json.loads(Path(path).read_text(), parse_constant=bad)
    except (OSError, ValueError) as err:
        return f"{Path(path).name}: {err}"
    return ""


def cases():
    syn = lambda ctx, d: ctx.syn  # noqa: E731
    tile = lambda ctx, d: ctx.tile_png  # noqa: E731
    out = lambda ctx, d: d / "out"  # noqa: E731
    scr_copy = lambda ctx, d: screening_copy(ctx, d)  # noqa: E731
    px = lambda ctx: ctx.pixels  # noqa: E731
    found = []
    add = found.append

    # --- validate: the tile-set tables -------------------------------------------------------------
    v = "validate"
    add(_ts_case(v, "tiles.csv missing", drop=("tiles.csv",), names=("tiles.csv",)))
    add(_ts_case(v, "consensus.csv missing", drop=("consensus.csv",), expected="either",
                 note="a tile set without consensus is valid for screening (validate says so)"))
    add(_ts_case(v, "tiles.csv empty file", tiles_text="", names=("tiles.csv",)))
    add(_ts_case(v, "tiles.csv header only (no tiles)", tiles_text="tile_id,image_id,path\n", names=("tiles.csv",)))
    add(_ts_case(v, "tiles.csv binary garbage", tiles_text=bytes(range(256)) * 4, names=("tiles.csv",)))
    add(_ts_case(v, "tiles.csv Latin-1 bytes", names=("tiles.csv",),
                 tiles_text="tile_id,image_id,path\nT\xe9,I,images/x.png\n".encode("latin-1")))
    add(_ts_case(v, "tiles.csv semicolon separated", names=("tiles.csv",),
                 tiles_text="tile_id;image_id;path\nA;B;images/SYN_0001_C_T00.png\n"))
    for col in ("tile_id", "image_id", "path"):
        add(_ts_case(v, f"tiles.csv lacks column {col}", tiles=drop_column(col), names=(col,)))
    add(_ts_case(v, "tile_id duplicated", tiles=lambda df: pd.concat([df, df.iloc[[0]]]), names=("SYN_0001_C_T00",)))
    add(_ts_case(v, "tile_id empty", tiles=set_cell(1, "tile_id", ""), names=("tile_id",)))
    add(_ts_case(v, "image_id empty", tiles=set_cell(1, "image_id", ""), names=("image_id",)))
    add(_ts_case(v, "path absolute", tiles=lambda df: set_cell(0, "path", str(ROOT / "demo_tiles" / "x.png"))(df),
                 names=("path",)))
    add(Case("path absolute to the set's own image", v, lambda ctx, d: {"argv": ["validate", tileset(
        ctx, d, tiles=set_cell(0, "path", str(ctx.syn / "images" / "SYN_0001_C_T00.png")))]}, names=("path",)))
    add(_ts_case(v, "path leaves the folder (../)", tiles=set_cell(0, "path", "../../syn/images/SYN_0001_C_T00.png"),
                 names=("path",)))
    add(_ts_case(v, "path missing file", tiles=set_cell(0, "path", "images/nothing.png"), names=("nothing.png",)))
    add(_ts_case(v, "path is a folder", tiles=set_cell(0, "path", "images"), names=("images",)))
    add(_ts_case(v, "path empty", tiles=set_cell(0, "path", ""), names=("path",)))
    for value in ("400", "-5", "abc"):
        add(_ts_case(v, f"solar_longitude_deg {value}", tiles=set_cell(0, "solar_longitude_deg", value),
                     names=("solar_longitude_deg",)))
    add(_ts_case(v, "solar_longitude_deg NaN", tiles=set_cell(0, "solar_longitude_deg", "NaN"), expected="either",
                 note="an empty optional value"))
    add(_ts_case(v, "metres_per_px 0", tiles=set_cell(0, "metres_per_px", "0"), names=("metres_per_px",)))
    add(_ts_case(v, "metres_per_px -0.25", tiles=set_cell(0, "metres_per_px", "-0.25"), names=("metres_per_px",)))
    add(_ts_case(v, "classifications -3", tiles=set_cell(0, "classifications", "-3"), names=("classifications",)))
    add(_ts_case(v, "classifications 2.5", tiles=set_cell(0, "classifications", "2.5"), names=("classifications",)))
    add(_ts_case(v, "col0 abc", tiles=set_cell(0, "col0", "abc"), names=("col0",)))
    add(_ts_case(v, "consensus lacks column kind", consensus=drop_column("kind"), names=("kind",)))
    add(_ts_case(v, "consensus lacks column direction_deg", consensus=drop_column("direction_deg"),
                 names=("direction_deg",)))
    add(_ts_case(v, "consensus kind 'crater'", consensus=set_cell(0, "kind", "crater"), names=("crater",)))
    add(_ts_case(v, "consensus tile_id unknown", consensus=set_cell(0, "tile_id", "NOPE_T00"), names=("NOPE_T00",)))
    for value in ("360", "-1", "NaN", "abc"):
        add(_ts_case(v, f"fan direction_deg {value}", consensus=set_first("fan", "direction_deg", value),
                     names=("direction_deg",)))
    add(_ts_case(v, "fan x_px outside the tile", consensus=set_first("fan", "x_px", "5000"), names=("x_px",)))
    add(_ts_case(v, "fan y_px negative", consensus=set_first("fan", "y_px", "-40"), names=("y_px",)))
    add(_ts_case(v, "fan x_px inf", consensus=set_first("fan", "x_px", "inf"), names=("x_px",)))
    add(_ts_case(v, "fan length_px 0", consensus=set_first("fan", "length_px", "0"), names=("length_px",)))
    add(_ts_case(v, "fan length_px empty", consensus=set_first("fan", "length_px", ""), names=("length_px",)))
    add(_ts_case(v, "fan opening_deg 200", consensus=set_first("fan", "opening_deg", "200"), names=("opening_deg",)))
    add(_ts_case(v, "spot semi_major_px -3", consensus=set_first("spot", "semi_major_px", "-3"),
                 names=("semi_major_px",)))
    add(_ts_case(v, "votes -1", consensus=set_cell(0, "votes", "-1"), names=("votes",)))
    add(_ts_case(v, "votes 2.5", consensus=set_cell(0, "votes", "2.5"), names=("votes",)))
    add(_ts_case(v, "fan_vote_share 1.5", consensus=set_cell(0, "fan_vote_share", "1.5"), names=("fan_vote_share",)))
    add(_ts_case(v, "consensus row duplicated", consensus=lambda df: pd.concat([df, df.iloc[[0]]]), expected="either",
                 note="two volunteers' features may coincide; validate counts them"))
    add(_ts_case(v, "--min-votes -1", extra=("--min-votes", "-1"), names=("min-votes",)))
    add(_argv_case(v, "tile set folder missing", ["validate", lambda ctx, d: d / "nowhere"], names=("nowhere",)))
    add(_argv_case(v, "tile set is a file", ["validate", tile], names=("SYN_0001_C_T00",)))

    # --- validate / screen: images -------------------------------------------------------------------
    images = [
        ("truncated PNG (60 %)", lambda ctx: truncated(ctx.tile_png, 0.6), ".png", "error"),
        ("corrupt PNG (bytes flipped)", lambda ctx: corrupted(ctx.tile_png), ".png", "error"),
        ("zero-byte PNG", lambda ctx: raw(b""), ".png", "error"),
        ("text file named .png", lambda ctx: raw(b"not an image\n" * 20), ".png", "error"),
        ("truncated TIFF", lambda ctx: (lambda p: (tiff(px(ctx))(p.with_suffix(".full")),
                                                     truncated(p.with_suffix(".full"), 0.5)(p))), ".tif", "error"),
        ("int16 in 0-32767", lambda ctx: tiff(px(ctx).astype(np.int16) * 128), ".tif", "handled"),
        ("int16 with negatives", lambda ctx: tiff(px(ctx).astype(np.int16) - 100), ".tif", "error"),
        ("int32 in 0-65535", lambda ctx: tiff(px(ctx).astype(np.int32) * 128), ".tif", "handled"),
        ("int32 beyond 65535", lambda ctx: tiff(px(ctx).astype(np.int32) * 1000), ".tif", "error"),
        ("float32 in [0, 1]", lambda ctx: tiff(px(ctx).astype(np.float32) / 255), ".tif", "handled"),
        ("float32 0-255", lambda ctx: tiff(px(ctx).astype(np.float32)), ".tif", "error"),
        ("float64 with inf", lambda ctx: tiff(np.where(px(ctx) > 250, np.inf, px(ctx) / 255.0)), ".tif", "either"),
        ("palette PNG", lambda ctx: png("P", px(ctx)), ".png", "error"),
        ("1-bit PNG", lambda ctx: png("1", px(ctx) > 128), ".png", "error"),
        ("RGB PNG", lambda ctx: png("RGB", np.dstack([px(ctx)] * 3)), ".png", "error"),
        ("grey+alpha PNG", lambda ctx: png("LA", np.dstack([px(ctx), np.full_like(px(ctx), 255)])), ".png", "error"),
        ("complex64 TIFF", lambda ctx: tiff(px(ctx).astype(np.complex64)), ".tif", "error"),
        ("10 x 10 image", lambda ctx: png("L", px(ctx)[:10, :10]), ".png", "error"),
        ("40 px strip (40 x 800)", lambda ctx: png("L", px(ctx)[:40, :]), ".png", "error"),
        ("decompression-bomb PNG (12000^2)", lambda ctx: png_bomb(12000, 12000), ".png", "error"),
    ]
    for label, make, suffix, expected in images:
        note = ("converted exactly: screens like the same numbers in uint16" if label.startswith("int") else
                "read as it is (floats in [0, 1] are supported)" if expected == "handled" else
                "non-finite pixels are no-data, like NaN" if expected == "either" else "")
        writer = lambda p, make=make: make(current_ctx)(p)  # noqa: E731
        add(_image_case(v, label, writer, suffix, expected=expected, note=note))
        if label.startswith("decompression"):
            continue  # a whole image file may be large: screen reads it by windows (the TIFF case below)
        check = None
        if expected == "handled" and label.startswith("int"):
            check = _same_screening_as(lambda p: tiff(px(current_ctx).astype(np.uint16) * 128)(p), ".tif")
        elif label.startswith("float64 with inf"):
            check = _some_nodata
        add(_image_case("screen", label, writer, suffix, expected=expected, note=note, check=check))
    add(_image_case(v, "sparse TIFF 30720^2 (a few kB)", lambda p: sparse_tiff(30720, 30720)(p), ".tif"))
    add(_image_case(v, "64 x 64 image (one patch)", lambda p: png("L", px(current_ctx)[:64, :64])(p),
                    expected="handled", note="the smallest tile the contract allows"))
    add(_image_case("screen", "RGB TIFF with --band 2", lambda p: geotiff(
        np.stack([px(current_ctx)] * 3), MARS_PS)(p), ".tif", extra=("--band", "2"), expected="handled",
        note="band chosen explicitly"))
    add(_image_case("screen", "RGB TIFF with --band 5", lambda p: geotiff(
        np.stack([px(current_ctx)] * 3), MARS_PS)(p), ".tif", extra=("--band", "5"), names=("band",)))
    add(_image_case("screen", "Earth CRS (EPSG:4326) raster", lambda p: geotiff(px(current_ctx), "EPSG:4326")(p),
                    ".tif", names=("CRS",)))
    add(_image_case("screen", "Earth CRS with --any-body", lambda p: geotiff(px(current_ctx), "EPSG:3031")(p),
                    ".tif", extra=("--any-body",), expected="handled", note="explicitly allowed"))
    add(_image_case("screen", "Mars polar stereographic GeoTIFF", lambda p: geotiff(px(current_ctx), MARS_PS)(p),
                    ".tif", expected="handled", note="the normal georeferenced case"))
    add(_image_case("screen", "all pixels 0 (all no-data)", lambda p: png("L", np.zeros_like(px(current_ctx)))(p),
                    expected="handled", note="routed nodata",
                    check=lambda ctx, d: "" if "nodata" in (d / "out" / "tiles.csv").read_text() else "not nodata"))
    add(_image_case("screen", "flat image (all 200)", lambda p: png("L", np.full_like(px(current_ctx), 200))(p),
                    expected="handled", note="scored, finite"))

    # --- screen: options, inputs and output folders --------------------------------------------------
    s = "screen"
    base = ["screen", MODEL, tile, "--out", out, "--workers", 1]
    add(_argv_case(s, "--nodata nan", [*base, "--nodata", "nan"], expected="either", watch=(out,),
                   note="NaN no-data accepted, run.json strict JSON",
                   check=lambda ctx, d: _json_strict(d / "out" / "run.json")))
    add(_argv_case(s, "--nodata abc", [*base, "--nodata", "abc"], names=("abc",), watch=(out,)))
    add(_argv_case(s, "--nodata none", [*base, "--nodata", "none"], expected="handled", note="no value is no-data",
                   check=lambda ctx, d: "" if '"none"' in (d / "out" / "run.json").read_text() else "not recorded"))
    crop = lambda ctx, d: (png("L", px(ctx)[:96, :128])(d / "crop.png"), d / "crop.png")[1]  # noqa: E731
    add(_argv_case(s, "--tile 10x10 (smaller than a patch)", ["screen", MODEL, crop, "--out", out, "--workers", 1,
                                                              "--tile", "10x10"], names=("tile",), watch=(out,)))
    add(_argv_case(s, "--tile abc", [*base, "--tile", "abc"], names=("abc",), watch=(out,)))
    add(_argv_case(s, "--tile 0x600", [*base, "--tile", "0x600"], names=("tile",), watch=(out,)))
    add(_argv_case(s, "--overlap -5", [*base, "--overlap", "-5"], names=("overlap",), watch=(out,)))
    add(_argv_case(s, "--workers 0", [*base[:-1], "0"], names=("workers",), watch=(out,)))
    add(_argv_case(s, "--band 0", [*base, "--band", "0"], names=("band",), watch=(out,)))
    add(_argv_case(s, "--scheduler unreachable", [*base, "--scheduler", "tcp://127.0.0.1:9"], names=("127.0.0.1",),
                   watch=(out,), timeout=120))
    add(_argv_case(s, "input missing", ["screen", MODEL, lambda ctx, d: d / "none.tif", "--out", out],
                   names=("none.tif",), watch=(out,)))
    add(_argv_case(s, "input empty folder", ["screen", MODEL, lambda ctx, d: d / "empty", "--out", out],
                   names=("empty",), watch=(out,), prep=lambda ctx, d: (d / "empty").mkdir()))
    add(_argv_case(s, "tile set with a truncated tile", ["screen", MODEL, lambda ctx, d: tileset(
        ctx, d, image=truncated(ctx.tile_png, 0.6)), "--out", out, "--workers", 1], names=("BAD_T00",), watch=(out,)))
    add(_argv_case(s, "tile set with a 40 px strip", ["screen", MODEL, lambda ctx, d: tileset(
        ctx, d, image=png("L", px(ctx)[:40, :])), "--out", out, "--workers", 1], names=("BAD_T00",), watch=(out,)))
    add(_argv_case(s, "tile set path leaving the folder", ["screen", MODEL, lambda ctx, d: tileset(
        ctx, d, tiles=set_cell(0, "path", "../../syn/images/SYN_0001_C_T00.png")), "--out", out],
        names=("path",), watch=(out,)))
    add(_argv_case(s, "model folder missing", ["screen", lambda ctx, d: d / "nomodel", tile, "--out", out],
                   names=("nomodel",), watch=(out,)))
    add(_argv_case(s, "--out is a file", ["screen", MODEL, tile, "--out", tile], names=("SYN_0001_C_T00",)))
    add(_argv_case(s, "--out non-empty, no run.json", [*base], names=("out",), watch=(out,),
                   prep=lambda ctx, d: ((d / "out").mkdir(), (d / "out" / "notes.txt").write_text("mine\n"))))
    add(_argv_case(s, "--out holds another run", ["screen", MODEL, ctx_syn_img1, "--out", out, "--workers", 1],
                   names=("another",), watch=(out,), prep=lambda ctx, d: shutil.copytree(ctx.screening, d / "out")))
    add(_argv_case(s, "--out run.json a list", [*base], names=("run.json",), watch=(out,),
                   prep=lambda ctx, d: ((d / "out").mkdir(), (d / "out" / "run.json").write_text("[1, 2]\n"))))
    add(_argv_case(s, "--out run.json not JSON", [*base], names=("run.json",), watch=(out,),
                   prep=lambda ctx, d: ((d / "out").mkdir(), (d / "out" / "run.json").write_text("{oops\n"))))
    add(_argv_case(s, "rerun after a failed run", [*base], expected="handled", watch=(out,),
                   note="a corrected rerun into the failed run's folder starts afresh", prep=_failed_run_first))
    add(_argv_case(s, "stale .outputs.* stage in --out", [*base], expected="handled", watch=(out,),
                   note="a killed run's hidden stage is swept on the next run", prep=_stale_stage,
                   check=lambda ctx, d: "" if not list((d / "out").glob(".outputs.*")) else "stage kept"))
    add(_argv_case(s, "--out in a read-only folder", ["screen", MODEL, tile, "--out", lambda ctx, d: d / "ro" / "out",
                                                      "--workers", 1], names=("ro",), prep=_ro_folder, nobody=True))

    # --- screen / evaluate / effort: model cards -----------------------------------------------------
    def card_set(path, value):
        def edit(card):
            node = card
            for key in path[:-1]:
                node = node[key]
            node[path[-1]] = value
        return edit

    def remove_file(name, *, drop_hash=False):
        def edit(model):
            (model / name).unlink()
            if drop_hash:
                card = json.loads((model / "model.json").read_text())
                card["files"].pop(name)
                (model / "model.json").write_text(json.dumps(card))
        return edit

    def append_byte(name):
        return lambda model: (model / name).write_bytes((model / name).read_bytes() + b"\x00")

    def garbage_with_hash(name):
        def edit(model):
            data = b"not an onnx model" * 10
            (model / name).write_bytes(data)
            card = json.loads((model / "model.json").read_text())
            card["files"][name] = hashlib.sha256(data).hexdigest()
            (model / "model.json").write_text(json.dumps(card))
        return edit

    model_damage = [
        ("model.json missing", dict(files=lambda m: (m / "model.json").unlink()), ("model.json",)),
        ("model.json not JSON", dict(card_text="{ this is not json"), ("model.json",)),
        ("model.json a JSON list", dict(card_text="[1, 2, 3]"), ("model.json",)),
        ("min_score NaN", dict(card=card_set(("assembly", "min_score"), float("nan"))), ("min_score",)),
        ("min_score -5", dict(card=card_set(("assembly", "min_score"), -5)), ("min_score",)),
        ("min_score 'abc'", dict(card=card_set(("assembly", "min_score"), "abc")), ("min_score",)),
        ("calibration temperature 0", dict(card=card_set(("calibration", "temperature"), 0)), ("temperature",)),
        ("calibration bias wrong length", dict(card=card_set(("calibration", "bias"), [0.0, 1.0])), ("bias",)),
        ("feature_names truncated", dict(card=lambda c: c.__setitem__("feature_names", c["feature_names"][:-3])),
         ("feature",)),
        ("feature version 1", dict(card=card_set(("feature_spec", "version"), 1)), ("version",)),
        ("format_version 99", dict(card=card_set(("format_version",), 99)), ("format_version",)),
        ("assembly background_px -1", dict(card=card_set(("assembly", "background_px"), -1)), ("background_px",)),
        ("detector.onnx missing", dict(files=remove_file("detector.onnx")), ("detector.onnx",)),
        ("objects.onnx missing, hash entry removed", dict(files=remove_file("objects.onnx", drop_hash=True)),
         ("objects.onnx",)),
        ("orientation.onnx hash mismatch", dict(files=append_byte("orientation.onnx")), ("orientation.onnx",)),
        ("detector.onnx garbage with its hash", dict(files=garbage_with_hash("detector.onnx")), ("detector.onnx",)),
    ]
    for label, damage, names in model_damage:
        add(_model_case("screen", label, names=names, **damage))
    for label, damage, names in model_damage[:1] + model_damage[3:4] + model_damage[13:15]:
        add(_model_case("evaluate", label, names=names, **damage))
    for label, damage, names in model_damage[3:4] + model_damage[13:15]:
        add(_model_case("effort", label, names=names, **damage))
    add(_model_case("effort", "heldout_tiles empty", card=card_set(("heldout_tiles",), []), names=("heldout",)))
    add(_model_case("effort", "heldout_tiles p_deposit 'x'", names=("p_deposit",),
                    card=lambda c: c["heldout_tiles"][0].__setitem__("p_deposit", "x")))

    # --- effort: the screening folder and options ----------------------------------------------------
    add(_effort_case("baseline screening", expected="handled", note="the valid input (writes routes into it)"))
    add(_effort_case("tiles.csv row duplicated", tiles=lambda df: pd.concat([df, df.iloc[[0]]]), names=("tiles.csv",)))
    add(_effort_case("tiles.csv row deleted", tiles=lambda df: df.iloc[1:], names=("tiles.csv",)))
    add(_effort_case("p_deposit 'abc'", tiles=set_cell(0, "p_deposit", "abc"), names=("p_deposit",)))
    add(_effort_case("p_deposit 1.5", tiles=set_cell(0, "p_deposit", "1.5"), names=("p_deposit",)))
    add(_effort_case("p_deposit empty", tiles=set_cell(0, "p_deposit", ""), expected="either",
                     note="an unknown p_deposit is never skipped: routed to the crowd", check=_first_tile_crowd))
    add(_effort_case("unfamiliarity -1", tiles=set_cell(0, "unfamiliarity", "-1"), names=("unfamiliarity",)))
    add(_effort_case("tiles.csv lacks p_deposit", tiles=drop_column("p_deposit"), names=("p_deposit",)))
    add(_effort_case("tiles.csv missing", drop=("tiles.csv",), names=("tiles.csv",)))
    add(_effort_case("run.json missing", drop=("run.json",), names=("run.json",)))
    add(_effort_case("run.json a JSON list", run_text="[]", names=("run.json",)))
    add(_effort_case("run.json not JSON", run_text="{nope", names=("run.json",)))
    add(_effort_case("run.json still running", run=lambda r: r.__setitem__("status", "running"), names=("run.json",)))
    add(_effort_case("another model's screening", run=lambda r: r["parameters"].__setitem__("model_hash", "0" * 64),
                     names=("model",)))
    add(_effort_case("--recall 1.5", extra=("--recall", "1.5"), names=("recall",)))
    add(_effort_case("--recall 0", extra=("--recall", "0"), names=("recall",)))
    add(_effort_case("--min-f1 -0.2", extra=("--min-f1", "-0.2"), names=("f1",)))
    add(_effort_case("--pass-share 0", extra=("--pass-share", "0"), names=("pass",)))
    add(_effort_case("--max-direction-error -5", extra=("--max-direction-error", "-5"), names=("direction",)))
    add(_effort_case("--seconds-per-classification -60", extra=("--seconds-per-classification", "-60"),
                     names=("seconds",)))
    add(_effort_case("--classifications-per-day 0", extra=("--classifications-per-day", "0"), names=("per",)))
    add(_effort_case("--start-date 2026-13-45", extra=("--start-date", "2026-13-45"), names=("2026-13-45",)))
    add(_effort_case("--classifications-needed 0", extra=("--classifications-needed", "0"), names=("needed",)))
    add(_effort_case("campaign TOML broken", extra=("--campaign", lambda ctx, d: d / "c.toml"), names=("c.toml",),
                     files=lambda ctx, d: (d / "c.toml").write_text("classifications_needed = [\n")))
    add(_effort_case("campaign unknown key", extra=("--campaign", lambda ctx, d: d / "c.toml"), names=("colour",),
                     files=lambda ctx, d: (d / "c.toml").write_text("colour = 'blue'\n")))
    add(_effort_case("campaign value wrong type", extra=("--campaign", lambda ctx, d: d / "c.json"),
                     names=("seconds_per_classification",),
                     files=lambda ctx, d: (d / "c.json").write_text('{"seconds_per_classification": "slow"}')))
    add(_effort_case("--classifications CSV 'abc'", extra=("--classifications", lambda ctx, d: d / "k.csv"),
                     names=("k.csv",), files=lambda ctx, d: (d / "k.csv").write_text(
                         "tile_id,classifications\nSYN_0001_C_T00,abc\n")))
    add(_effort_case("--classifications CSV negative", extra=("--classifications", lambda ctx, d: d / "k.csv"),
                     names=("k.csv",), files=lambda ctx, d: (d / "k.csv").write_text(
                         "tile_id,classifications\nSYN_0001_C_T00,-4\n")))
    add(_argv_case("effort", "screening folder missing", ["effort", MODEL, lambda ctx, d: d / "noscreen"],
                   names=("noscreen",)))
    add(_argv_case("effort", "--out in a read-only folder", ["effort", MODEL, scr_copy, "--out",
                                                             lambda ctx, d: d / "ro" / "out"],
                   names=("ro",), prep=_ro_folder, nobody=True))

    # --- evaluate ------------------------------------------------------------------------------------
    e = "evaluate"
    add(_ts_case(e, "no consensus.csv", drop=("consensus.csv",), names=("consensus",)))
    add(_ts_case(e, "fan direction_deg 400", consensus=set_first("fan", "direction_deg", "400"),
                 names=("direction_deg",)))
    add(Case("truncated tile", e, lambda ctx, d: {"argv": ["evaluate", MODEL, tileset(
        ctx, d, image=truncated(ctx.tile_png, 0.6)), "--out", d / "out"], "watch": [d / "out"]}, names=("BAD_T00",)))
    add(_argv_case(e, "--min-score 2", ["evaluate", MODEL, syn, "--out", out, "--min-score", "2"],
                   names=("min-score",), watch=(out,)))
    add(_argv_case(e, "--min-score nan", ["evaluate", MODEL, syn, "--out", out, "--min-score", "nan"],
                   names=("min-score",), watch=(out,)))
    add(_argv_case(e, "--workers -1", ["evaluate", MODEL, syn, "--out", out, "--workers", "-1"],
                   names=("workers",), watch=(out,)))
    add(_argv_case(e, "--out non-empty without --force", ["evaluate", MODEL, syn, "--out", out],
                   names=("out",), watch=(out,),
                   prep=lambda ctx, d: ((d / "out").mkdir(), (d / "out" / "mine.txt").write_text("keep\n"))))
    add(_argv_case(e, "--out in a read-only folder", ["evaluate", MODEL, syn, "--out", lambda ctx, d: d / "ro" / "out",
                                                      "--workers", 1], names=("ro",), prep=_ro_folder, nobody=True))

    # --- train ---------------------------------------------------------------------------------------
    t = "train"
    add(_ts_case(t, "no consensus.csv", drop=("consensus.csv",), names=("consensus",)))
    add(_ts_case(t, "empty tile set", tiles_text="tile_id,image_id,path\n", names=("tiles.csv",)))
    add(_ts_case(t, "one image only", tiles=lambda df: df[df["image_id"] == df["image_id"].iloc[0]],
                 consensus=lambda df: df[df["tile_id"].str.startswith("SYN_0001")], names=("image",)))
    add(_ts_case(t, "votes abc", consensus=set_cell(0, "votes", "abc"), names=("votes",)))
    add(_ts_case(t, "3 images x 1 tile, --max-patches 20000", expected="either", timeout=400,
                 note="a tiny valid set: trains or says why not"))
    add(_ts_case(t, "2 images (too few to split)", source="syn", names=("image",)))
    add(_ts_case(t, "--max-patches 0", extra=("--max-patches", "0"), names=("patches", "0")))
    add(_ts_case(t, "--holdout-fraction 1.5", extra=("--holdout-fraction", "1.5"), names=("holdout",)))
    add(_ts_case(t, "--holdout-images unknown id", extra=("--holdout-images", "NOPE_1"), names=("NOPE_1",)))
    add(_argv_case(t, "--out non-empty without --force", ["train", lambda ctx, d: ctx.syn3, "--out", out,
                                                          "--max-patches", 20000],
                   names=("out",), watch=(out,),
                   prep=lambda ctx, d: ((d / "out").mkdir(), (d / "out" / "mine.txt").write_text("keep\n"))))

    # --- winds ---------------------------------------------------------------------------------------
    w = "winds"
    add(_ts_case(w, "crowd baseline", expected="handled", note="the valid input"))
    add(_ts_case(w, "crowd fan direction_deg 400", consensus=set_first("fan", "direction_deg", "400"),
                 names=("direction_deg",)))
    add(_ts_case(w, "crowd solar_longitude_deg abc", tiles=set_cell(0, "solar_longitude_deg", "abc"),
                 names=("solar_longitude_deg",)))
    add(_ts_case(w, "--ls-bin 0", extra=("--ls-bin", "0"), names=("ls-bin",)))
    add(_ts_case(w, "--ls-bin 400", extra=("--ls-bin", "400"), names=("ls-bin",)))
    add(_ts_case(w, "--bootstrap -1", extra=("--bootstrap", "-1"), names=("bootstrap",)))
    add(_ts_case(w, "--min-fans -1", extra=("--min-fans", "-1"), names=("min-fans",)))
    add(_argv_case(w, "no catalog at all", ["winds", "--out", out], names=("crowd",), watch=(out,)))
    add(_argv_case(w, "--machine folder without screening", ["winds", "--crowd", syn, "--machine",
                                                            lambda ctx, d: d / "empty", "--out", out],
                   names=("empty",), watch=(out,), prep=lambda ctx, d: (d / "empty").mkdir()))
    add(_argv_case(w, "--images CSV lacks solar_longitude_deg", ["winds", "--crowd", syn, "--images",
                                                                  lambda ctx, d: d / "im.csv", "--out", out],
                   names=("im.csv",), watch=(out,),
                   prep=lambda ctx, d: (d / "im.csv").write_text("image_id,region\nSYN_0001_C,Gamma\n")))
    add(_argv_case(w, "--model-winds CSV garbage", ["winds", "--crowd", syn, "--model-winds",
                                                    lambda ctx, d: d / "mw.csv", "--out", out],
                   names=("mw.csv",), watch=(out,), prep=lambda ctx, d: (d / "mw.csv").write_text("a;b\n1;2\n")))
    add(_argv_case(w, "--machine screening with tiles.csv n_fans abc",
                   ["winds", "--crowd", syn, "--machine", lambda ctx, d: screening_copy(
                       ctx, d, tiles=set_cell(0, "n_fans", "abc")), "--out", out],
                   names=("n_fans",), watch=(out,), expected="either",
                   note="winds reads the detections, not the tile counts"))

    # --- the other commands --------------------------------------------------------------------------
    add(_argv_case("synth", "--images 0", ["synth", out, "--images", "0"], names=("images",), watch=(out,)))
    add(_argv_case("synth", "--tiles-per-image -2", ["synth", out, "--tiles-per-image", "-2"],
                   names=("tiles-per-image",), watch=(out,)))
    add(_argv_case("synth", "out is a file", ["synth", tile], names=("SYN_0001_C_T00",)))
    add(_argv_case("synth", "out non-empty without --force", ["synth", out, "--images", 1, "--tiles-per-image", 1],
                   names=("out",), watch=(out,),
                   prep=lambda ctx, d: ((d / "out").mkdir(), (d / "out" / "mine.txt").write_text("keep\n"))))
    add(_argv_case("backtest", "no consensus.csv", ["backtest", MODEL, lambda ctx, d: tileset(
        ctx, d, drop=("consensus.csv",)), "--out", out], names=("consensus",), watch=(out,)))
    add(_argv_case("backtest", "--workers 0", ["backtest", MODEL, syn, "--out", out, "--workers", "0"],
                   names=("workers",), watch=(out,)))
    add(_argv_case("labelling-order", "--batch 0", ["labelling-order", MODEL, lambda ctx, d: ctx.syn7, "--out", out,
                                                    "--batch", "0"], names=("batch",), watch=(out,), timeout=180))
    add(_argv_case("labelling-order", "too few images for the split", ["labelling-order", MODEL, syn, "--out", out],
                   names=("image",), watch=(out,)))
    add(_argv_case("benchmark", "run: bench folder empty", ["benchmark", "run", MODEL, lambda ctx, d: d / "bench",
                                                            "--out", out], names=("bench",), watch=(out,),
                   prep=lambda ctx, d: (d / "bench").mkdir()))
    add(_argv_case("benchmark", "build: --train-images 0", ["benchmark", "build", out, "--train-images", "0"],
                   names=("train-images",), watch=(out,)))
    add(_argv_case("demo", "--tiles missing", ["demo", "--out", out, "--tiles", lambda ctx, d: d / "nothere"],
                   names=("nothere",), watch=(out,)))
    nan_card = lambda ctx, d: model_copy(d, card=card_set(("assembly", "min_score"), float("nan")))  # noqa: E731
    add(_argv_case("demo", "--model damaged (min_score NaN)", ["demo", "--out", out, "--model", nan_card],
                   names=("min_score",), watch=(out,)))
    return found


current_ctx = None  # the image writers read the baseline pixels from here


def ctx_syn_img1(ctx, d):
    return ctx.syn / "images" / "SYN_0002_C_T00.png"


def _failed_run_first(ctx, d):
    """A screening that fails on a truncated image, leaving its record in ``d/out``; the case reruns it fixed."""
    bad = d / "SYN_0001_C_T00.png"
    truncated(ctx.tile_png, 0.6)(bad)
    code, _, _, _ = frostvane(["screen", MODEL, bad, "--out", d / "out", "--workers", 1])
    if code != 2:
        raise RuntimeError(f"the failing first run exited {code}")
    shutil.copy(ctx.tile_png, bad)  # the corrected input, same path


def _stale_stage(ctx, d):
    """A finished screening of the case's input with a hidden stage a killed run left beside it."""
    code, _, _, _ = frostvane(["screen", MODEL, ctx.tile_png, "--out", d / "out", "--workers", 1])
    if code != 0:
        raise RuntimeError(f"the first run exited {code}")
    (d / "out" / ".outputs.abc123").mkdir()
    (d / "out" / ".outputs.abc123" / "tiles.csv").write_text("half\n")


# ----------------------------------------------------------------------------- report


def print_tables(results):
    by_command = {}
    for r in results:
        by_command.setdefault(r["command"], []).append(r)
    for command, rows in by_command.items():
        print(f"\n{command} ({len(rows)} inputs)")
        for r in rows:
            line = r["stderr_first_line"] if r["outcome"] != "handled" else (r["detail"] or "exit 0")
            print(f"  {r['case'][:42]:42s} {r['outcome']:13s} {str(r['exit_code']):>2s}  {line[:90]}")


def totals(results):
    counts = {k: sum(r["outcome"] == k for r in results) for k in OUTCOMES}
    return {"inputs tried": len(results), **counts}


def main():
    global current_ctx
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", type=Path, required=True, help="Folder for bad_inputs.csv and bad_inputs.json.")
    parser.add_argument("--only", default="", help="Run only the cases of this command (default: all).")
    parser.add_argument("--case", default="", help="Run only the cases whose name holds this text.")
    parser.add_argument("--keep", action="store_true", help="Keep the temporary folder (its path is printed).")
    args = parser.parse_args()
    started = time.perf_counter()
    tmp = Path(tempfile.mkdtemp(prefix="frostvane_bad_"))
    os.chmod(tmp, 0o755)  # the read-only cases run as another user, who must read the inputs
    try:
        ctx = current_ctx = Context(tmp)
        ctx.prepare()
        todo = [c for c in cases() if (not args.only or c.command == args.only)
                and args.case.lower() in c.name.lower()]
        results = []
        for i, case in enumerate(todo, 1):
            folder = tmp / "cases" / f"{i:03d}"
            folder.mkdir(parents=True)
            os.chmod(folder, 0o755)
            try:
                r = run_case(ctx, case, folder)
            except Exception as err:  # a harness bug in one case must not hide the others
                r = {"case": case.name, "command": case.command, "expected": case.expected, "outcome": "traceback",
                     "exit_code": "", "stderr_lines": 0, "stderr_first_line": f"harness: {type(err).__name__}: {err}",
                     "detail": "harness", "seconds": 0, "argv": ""}
            results.append(r)
            print(f"[{i:3d}/{len(todo)}] {case.command:15s} {case.name[:44]:44s} {r['outcome']:13s} "
                  f"{r['seconds']:5.1f} s", file=sys.stderr, flush=True)
    finally:
        if args.keep:
            print(f"inputs kept in {tmp}", file=sys.stderr)
        else:
            shutil.rmtree(tmp, ignore_errors=True)
    args.out.mkdir(parents=True, exist_ok=True)
    columns = ["case", "command", "expected", "outcome", "exit_code", "stderr_lines", "stderr_first_line", "detail",
               "seconds", "argv"]
    with open(args.out / "bad_inputs.csv", "w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=columns)
        writer.writeheader()
        writer.writerows(results)
    summary = {**totals(results), "seconds": round(time.perf_counter() - started)}
    (args.out / "bad_inputs.json").write_text(json.dumps(summary, indent=2) + "\n")
    print_tables(results)
    print("\ntotals: " + ", ".join(f"{k} {v}" for k, v in summary.items()))
    print(f"written: {args.out / 'bad_inputs.csv'}")
    return 1 if any(summary[k] for k in BAD) else 0


if __name__ == "__main__":
    sys.exit(main())
