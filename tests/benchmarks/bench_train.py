"""Benchmark: train on N synthetic tiles; print seconds and peak memory.

Usage::

    python tests/benchmarks/bench_train.py [--tiles 1000] [--workers 2] [--keep DIR]

The tiles are rendered first (not timed) by the demo's scene generator, five
tiles of 800 x 600 px per invented image. Training runs in a child process so
that its peak resident memory (its own and its workers', from getrusage) is
measured alone. The last line printed is one JSON object with ``tiles``,
``seconds`` and ``peak_rss_mb``.
"""

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tiles", type=int, default=1000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--keep", type=Path, default=None,
                        help="Keep the tile set and model here (a tile set already there is reused).")
    args = parser.parse_args()
    from training.synth import synthesize_tileset

    work = Path(args.keep or tempfile.mkdtemp(prefix="frostvane-bench-train-"))
    tiles_per_image = 5
    n_images = max(3, -(-args.tiles // tiles_per_image))
    tileset = work / "tiles"
    t0 = time.perf_counter()
    if args.keep and (tileset / "tiles.csv").is_file():
        print(f"reusing the tile set in {tileset}", flush=True)
    else:
        synthesize_tileset(tileset, n_images=n_images, tiles_per_image=tiles_per_image, seed=args.seed, force=True)
        print(f"rendered {n_images * tiles_per_image} tiles in {time.perf_counter() - t0:.0f} s (not timed)", flush=True)
    code = (
        "import sys; sys.path.insert(0, %r)\n"
        "from training.fitting.train import TrainConfig, train_model\n"
        "card = train_model(%r, %r, TrainConfig(seed=%d, workers=%d), force=True, log=lambda m: print(m, flush=True))\n"
        "import json; print('HELDOUT ' + json.dumps(card['heldout_metrics']))\n"
    ) % (str(ROOT), str(tileset), str(work / "model"), args.seed, args.workers)
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code], check=False)
    seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.exit(proc.returncode)
    # ru_maxrss of children is the largest single child (training process or one of its workers), in KiB.
    peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    print(json.dumps({"tiles": n_images * tiles_per_image, "seconds": round(seconds, 1),
                      "peak_rss_mb": round(peak_mb, 1), "workers": args.workers}))


if __name__ == "__main__":
    main()
