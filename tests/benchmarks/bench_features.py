"""Throughput of the patch feature engine (a script; pytest does not collect it).

    python tests/benchmarks/bench_features.py [--rows 6000 --cols 8000] [--naive-patches N]

Each measurement runs in its own subprocess so that its peak resident memory
(``resource.getrusage``) is its own:

* ``tile``: full extraction (W = 64, S = 16) on one 800 x 600 tile, and the same
  patches with a naive per-patch loop of scikit-image calls (HOG, GLCM + props,
  two LBPs, structure tensor) for comparison;
* ``large``: a synthetic 8000 x 6000 image written as a tiled TIFF, then read
  window by window (``--window`` cores, multiples of the stride, plus a
  ``patch_px - stride_px`` margin so that every patch is complete; context windows
  are clipped at the window) and reduced to a checksum, so memory does not grow
  with the image.

Wall-clock figures depend on what else runs on the machine; the ``cpu_*`` figures
(process CPU time) are the steadier measure on a shared machine.

The last printed line is one JSON object: ``mpx_per_s`` (large image, single
process), ``tile_mpx_per_s``, ``naive_ratio``, ``peak_rss_mb`` (large image),
``tile_peak_rss_mb`` and the timings.
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np
from scipy import ndimage as ndi



def _scene(shape, seed):
    """Invented frost scene: smooth albedo, noise, a few dark wedges and blobs (uint8)."""
    rng = np.random.default_rng(seed)
    h, w = shape
    base = ndi.zoom(rng.normal(size=(h // 32 + 2, w // 32 + 2)), 32, order=1)[:h, :w]
    img = 150 + 12 * base + rng.normal(0, 4, size=shape)
    y, x = np.ogrid[:h, :w]
    for _ in range(max(1, h * w // 60000)):
        ay, ax = rng.uniform(0, h), rng.uniform(0, w)
        ang = np.radians(rng.uniform(0, 360))
        s = (x - ax) * np.sin(ang) - (y - ay) * np.cos(ang)
        t = (x - ax) * np.cos(ang) + (y - ay) * np.sin(ang)
        length = rng.uniform(30, 120)
        fan = (s > 0) & (s < length) & (np.abs(t) < 0.3 * s)
        img -= 50 * fan * (1 - s / length)
    return np.clip(img, 1, 255).astype(np.uint8)


def _rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _naive(tile, spec, n_patches):
    """Per-patch loop of scikit-image calls over the first ``n_patches`` windows."""
    from skimage.feature import graycomatrix, graycoprops, hog, local_binary_pattern, structure_tensor

    from detector.tile import _dense
    from detector.tile.features import patch_grid

    prep = _dense.prepare_tile(tile, spec)
    q = _dense.quantise(prep.image, prep.lo, prep.hi, spec.glcm_levels).astype(np.uint8)
    grid = patch_grid(tile.shape, spec)
    W = spec.patch_px
    angles = np.radians(spec.glcm_angles_deg)
    out = []
    for p in range(min(n_patches, grid.n_patches)):
        r, c = grid.row0[p], grid.col0[p]
        win = prep.image[r:r + W, c:c + W]
        feats = [hog(win, orientations=spec.hog_orientations, pixels_per_cell=(spec.hog_cell_px,) * 2,
                     cells_per_block=(spec.hog_block_cells,) * 2, block_norm="L2-Hys")]
        glcm = graycomatrix(q[r:r + W, c:c + W], spec.glcm_distances, angles, levels=spec.glcm_levels,
                            symmetric=True, normed=True)
        feats += [graycoprops(glcm, prop).ravel()
                  for prop in ("contrast", "dissimilarity", "homogeneity", "ASM", "energy", "correlation")]
        for P, R in spec.lbp:
            codes = local_binary_pattern(prep.u16[r:r + W, c:c + W], P, R, "uniform")
            feats.append(np.bincount(codes.astype(int).ravel(), minlength=P + 2) / codes.size)
        a_rr, a_rc, a_cc = structure_tensor(win, sigma=spec.st_tensor_sigma, mode="reflect")
        feats.append([a_rr.mean(), a_rc.mean(), a_cc.mean()])
        out.append(np.concatenate([np.ravel(f) for f in feats]))
    return np.array(out), min(n_patches, grid.n_patches), grid.n_patches


def worker_tile(args):
    from detector.tile.features import extract_features
    from detector.tile.spec import FeatureSpec

    spec = FeatureSpec()
    tile = _scene((600, 800), seed=1)
    extract_features(tile, spec)  # warm-up
    times, cpus = [], []
    for _ in range(args.repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        X, grid = extract_features(tile, spec)
        times.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)
    fast, fast_cpu = min(times), min(cpus)
    t0, c0 = time.perf_counter(), time.process_time()
    _, n_done, n_total = _naive(tile, spec, args.naive_patches)
    naive = (time.perf_counter() - t0) * n_total / n_done
    naive_cpu = (time.process_time() - c0) * n_total / n_done
    return {
        "tile_shape": list(tile.shape),
        "tile_patches": int(grid.n_patches),
        "n_features": int(X.shape[1]),
        "tile_seconds": fast,
        "tile_mpx_per_s": tile.size / fast / 1e6,
        "naive_seconds": naive,
        "naive_patches_timed": int(n_done),
        "naive_ratio": naive / fast,
        "cpu_naive_ratio": naive_cpu / fast_cpu,
        "tile_cpu_seconds": fast_cpu,
        "tile_peak_rss_mb": _rss_mb(),
    }


def write_large(path, rows, cols):
    import rasterio
    from rasterio.windows import Window

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # not georeferenced: a synthetic image
        with rasterio.open(path, "w", driver="GTiff", width=cols, height=rows, count=1, dtype="uint8",
                           tiled=True, blockxsize=256, blockysize=256) as dst:
            # a few invented 1024 x 1024 blocks, flipped and cycled: cheap to make, varied to read
            blocks = [_scene((1024, 1024), seed=100 + k) for k in range(4)]
            for i, r in enumerate(range(0, rows, 1024)):
                h = min(1024, rows - r)
                strip = np.concatenate(
                    [np.flip(blocks[(i + j) % 4], axis=(i + j) % 2) for j in range(-(-cols // 1024))], axis=1)
                dst.write(strip[:h, :cols], 1, window=Window(0, r, cols, h))


def worker_large(args):
    import rasterio
    from rasterio.windows import Window

    from detector.tile.features import extract_features, patch_grid
    from detector.tile.spec import FeatureSpec

    spec = FeatureSpec()
    margin = spec.patch_px - spec.stride_px
    core_rows, core_cols = (int(v) for v in args.window.split("x"))
    n_patches, checksum = 0, 0.0
    t0, c0 = time.perf_counter(), time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with rasterio.open(args.path) as src:
            rows, cols = src.height, src.width
            for r in range(0, rows, core_rows):
                for c in range(0, cols, core_cols):
                    h = min(core_rows + margin, rows - r)
                    w = min(core_cols + margin, cols - c)
                    window = src.read(1, window=Window(c, r, w, h))
                    X, grid = extract_features(window, spec)
                    n_patches += grid.n_patches
                    checksum += float(X.sum(dtype=np.float64))
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    expected = patch_grid((rows, cols), spec).n_patches
    if n_patches != expected:
        raise SystemExit(f"window patches {n_patches} != full-image patches {expected}")
    return {
        "large_shape": [rows, cols],
        "large_patches": n_patches,
        "large_seconds": seconds,
        "large_window": [core_rows + margin, core_cols + margin],
        "mpx_per_s": rows * cols / seconds / 1e6,
        "cpu_mpx_per_s": rows * cols / cpu / 1e6,
        "peak_rss_mb": _rss_mb(),
        "checksum": checksum,
    }


def _run(*extra):
    cmd = [sys.executable, os.path.abspath(__file__), *extra]
    res = subprocess.run(cmd, check=True, capture_output=True, text=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=6000)
    parser.add_argument("--cols", type=int, default=8000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--naive-patches", type=int, default=400,
                        help="naive loop timed on this many patches and scaled to the whole tile")
    parser.add_argument("--worker", choices=("tile", "large"))
    parser.add_argument("--path")
    parser.add_argument("--window", default="592x784", help="core rows x cols of each read window, px")
    args = parser.parse_args()
    if args.worker == "tile":
        print(json.dumps(worker_tile(args)))
        return
    if args.worker == "large":
        print(json.dumps(worker_large(args)))
        return
    result = _run("--worker", "tile", "--repeat", str(args.repeat), "--naive-patches", str(args.naive_patches))
    print(f"tile {result['tile_shape']}: {result['tile_seconds']:.3f} s, naive {result['naive_seconds']:.1f} s, "
          f"ratio {result['naive_ratio']:.1f}")
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "large.tif")
        t0 = time.perf_counter()
        write_large(path, args.rows, args.cols)
        print(f"wrote {args.rows} x {args.cols} tiled TIFF in {time.perf_counter() - t0:.1f} s")
        large = _run("--worker", "large", "--path", path, "--window", args.window)
    print(f"large: {large['large_seconds']:.1f} s, {large['mpx_per_s']:.2f} Mpx/s "
          f"({large['cpu_mpx_per_s']:.2f} Mpx/s of CPU time), "
          f"peak RSS {large['peak_rss_mb']:.0f} MB")
    result.update(large)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
