"""Throughput and peak memory of ``frostvane screen`` on large GeoTIFFs.

Not a test: run by hand, e.g.

    python tests/benchmarks/bench_screen.py --model models/demo
    python tests/benchmarks/bench_screen.py --model DIR --sizes 20000x20000 28284x28284 --workers 2

For every size it writes a synthetic single-band GeoTIFF (Mars south polar
stereographic, 1 m pixels) window by window with
:func:`detector.gis.raster.write_by_windows`, filled with the demo tiles repeated
(or rendered scenes when no tile set is given), then runs ``frostvane screen``
on it in a subprocess and measures

* wall time of the whole subprocess (start-up, model loading, all tiles,
  outputs), giving ``mpx_per_s``, and the tile loop's share of it
  (``tile_seconds``, from the run's own ``run.json``);
* peak resident set size of the whole process tree, by sampling the sum of
  RSS over the screen process and all its descendants (psutil) every 0.1 s
  (``peak_rss_mb``), and, as a cross-check, the largest single-process peak
  reported by ``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss``
  (``max_process_rss_mb``; the kernel keeps the maximum, not the sum).

With windowed reads the peak should not grow with the image. The big files
are deleted at the end. The last line printed is one JSON object.
"""

import argparse
import json
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[2]


def _size(text):
    w, h = (int(v) for v in text.lower().split("x"))
    return w, h


def _tile_source(tiles_dir):
    """A fill function that repeats the tiles of a tile set over the image, shuffled per grid cell."""
    import pandas as pd

    from detector.io import read_image

    table = pd.read_csv(Path(tiles_dir) / "tiles.csv")
    stack = np.stack([read_image(Path(tiles_dir) / p) for p in table["path"]])  # (n, 600, 800) uint8
    n, th, tw = stack.shape

    def fill(col0, row0, width, height):
        rows = np.arange(row0, row0 + height)
        cols = np.arange(col0, col0 + width)
        cell = (rows[:, None] // th) * 7919 + (cols[None, :] // tw) * 104729
        return stack[cell % n, (rows % th)[:, None], (cols % tw)[None, :]]

    return fill


def _scene_source(seed=0):
    from training.synth import render_scene, to_uint8

    def fill(col0, row0, width, height):
        image, _ = render_scene((height, width), np.random.default_rng((seed, row0, col0)), nodata=False)
        return to_uint8(image)

    return fill


def _write(path, width, height, fill):
    from affine import Affine

    from detector.gis.geo import MARS_SOUTH_POLAR_STEREO
    from detector.gis.raster import write_by_windows

    transform = Affine(1.0, 0.0, 250_000.0, 0.0, -1.0, 20_000.0)
    write_by_windows(path, width, height, fill, crs=MARS_SOUTH_POLAR_STEREO, transform=transform, window=1024)


def _tree_rss(proc, peaks):
    """Sum of RSS over a process and its descendants, bytes; also updates each one's peak in ``peaks``."""
    import psutil

    try:
        procs = [proc] + proc.children(recursive=True)
    except psutil.NoSuchProcess:
        return 0
    total = 0
    for p in procs:
        try:
            rss = p.memory_info().rss
        except psutil.NoSuchProcess:
            continue
        total += rss
        peaks[p.pid] = max(peaks.get(p.pid, 0), rss)
    return total


def _screen(model, image, out, workers):
    import psutil

    argv = [sys.executable, "-m", "frostvane.cli", "screen", str(model), str(image), "--out", str(out),
            "--workers", str(workers)]
    start = time.perf_counter()
    proc = subprocess.Popen(argv, cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    ps = psutil.Process(proc.pid)
    peak, peaks = 0, {}
    while proc.poll() is None:
        peak = max(peak, _tree_rss(ps, peaks))
        time.sleep(0.1)
    seconds = time.perf_counter() - start
    stdout = proc.stdout.read()
    if proc.returncode != 0:
        raise SystemExit(f"frostvane screen failed with exit code {proc.returncode}")
    parent = peaks.pop(proc.pid, 0)
    return seconds, peak / 2**20, stdout, parent / 2**20, max(peaks.values(), default=0) / 2**20


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", type=Path, default=REPO / "models" / "demo")
    parser.add_argument("--sizes", nargs="*", type=_size, default=[(20000, 20000), (28284, 28284)],
                        help="image sizes WIDTHxHEIGHT, px")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--tiles", type=Path, default=REPO / "demo_tiles",
                        help="tile set whose tiles fill the image; rendered scenes when it is missing")
    parser.add_argument("--scratch", type=Path, default=None, help="folder for the big files (a temp folder)")
    args = parser.parse_args(argv)
    if not (args.model / "model.json").is_file():
        raise SystemExit(f"model folder {str(args.model)!r} has no model.json; pass --model")
    fill = _tile_source(args.tiles) if (args.tiles / "tiles.csv").is_file() else _scene_source()
    results = {"workers": args.workers, "rss": "psutil sum over the process tree, sampled every 0.1 s",
               "sizes": {}}
    scratch = Path(tempfile.mkdtemp(prefix="bench_screen_", dir=args.scratch))
    try:
        for width, height in args.sizes:
            image = scratch / f"bench_{width}x{height}.tif"
            t = time.perf_counter()
            _write(image, width, height, fill)
            write_s = time.perf_counter() - t
            out = scratch / f"out_{width}x{height}"
            seconds, peak_mb, stdout, parent_mb, worker_mb = _screen(args.model, image, out, args.workers)
            timing = json.loads((out / "run.json").read_text())["timing"]
            mpx = width * height / 1e6
            entry = {
                "megapixels": round(mpx, 1),
                "write_seconds": round(write_s, 1),
                "file_mb": round(image.stat().st_size / 2**20, 1),
                "seconds": round(seconds, 1),
                # the tile loop alone (from run.json); the rest is start-up, planning and outputs
                "tile_seconds": round(timing["tile_seconds"], 1),
                "mpx_per_s": round(mpx / seconds, 3),
                "peak_rss_mb": round(peak_mb, 1),
                "parent_peak_rss_mb": round(parent_mb, 1),
                "worker_peak_rss_mb": round(worker_mb, 1),
                "max_process_rss_mb": round(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024, 1),
            }
            results["sizes"][f"{width}x{height}"] = entry
            print(stdout.strip())
            print(f"{width} x {height}: {json.dumps(entry)}", flush=True)
            image.unlink()
            shutil.rmtree(out)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    print(json.dumps(results))


if __name__ == "__main__":
    main()
