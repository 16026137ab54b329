"""Benchmark: ``frostvane train`` on 2 local workers against a 2-worker Dask cluster.

Usage::

    python tests/benchmarks/bench_train_cluster.py [--images 3] [--tiles-per-image 16] [--repeats 3]

A small tile set is rendered first (``frostvane synth``, not timed). The script then
starts a Dask ``LocalCluster`` of its own (2 worker processes, 1 thread each, on this
machine; its start-up is timed apart) and trains the same set with the same seed, in
alternating runs, with ``frostvane train --workers 2`` and with ``frostvane train
--scheduler ADDRESS``, each in a fresh process whose wall time is measured (start-up,
every stage, the model card). The cluster stays up between its runs, as a standing
cluster would. Every run must write the same four ONNX files, byte for byte.

The fits (gradient boosting in the training process, the same work on both sides) run
on ``--fit-threads`` OpenMP threads, 1 by default: on a shared two-core machine two
spinning OpenMP threads made the same fit take 4 s in one run and 44 s in another,
which would drown the difference under test. Each run's fit seconds are read from its
log, so the rest (the tile loops, start-up, export) is shown apart.

It prints each run's wall time, the median of each side and their ratio (cluster /
local); the last line printed is one JSON object.
"""

import argparse
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
ONNX_FILES = ("detector.onnx", "orientation.onnx", "objects.onnx", "context.onnx")


def _frostvane(args, log, env):
    """Run ``frostvane ARGS`` from the source tree; return its wall time in seconds."""
    start = time.perf_counter()
    with open(log, "w") as out:
        proc = subprocess.run([sys.executable, "-m", "frostvane.cli", *map(str, args)], cwd=ROOT, env=env,
                              stdout=out, stderr=subprocess.STDOUT, check=False)
    seconds = time.perf_counter() - start
    if proc.returncode != 0:
        sys.exit(f"frostvane {' '.join(map(str, args))} failed ({proc.returncode}); see {log}:\n"
                 + "\n".join(Path(log).read_text().splitlines()[-15:]))
    return seconds


def _fit_seconds(log):
    """Seconds of every fit a training log reports ("fitted ...: N iterations in S s")."""
    return sum(float(s) for s in re.findall(r"^fitted .*: \d+ iterations in ([0-9.]+) s$", Path(log).read_text(), re.M))


def _model_bytes(folder):
    return tuple((Path(folder) / name).read_bytes() for name in ONNX_FILES)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=3, help="Invented images (training needs at least 3).")
    parser.add_argument("--tiles-per-image", type=int, default=16)
    parser.add_argument("--repeats", type=int, default=3, help="Runs of each kind, alternating.")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--fit-threads", type=int, default=1,
                        help="OpenMP threads of the fits in the training process (OMP_NUM_THREADS).")
    parser.add_argument("--keep", type=Path, default=None, help="Work folder to keep (default: a temporary one).")
    args = parser.parse_args()

    work = Path(args.keep or tempfile.mkdtemp(prefix="frostvane-bench-cluster-"))
    work.mkdir(parents=True, exist_ok=True)
    # The cluster's workers and every frostvane process import this source tree; no progress bars in the logs.
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])),
           "TQDM_DISABLE": "1"}
    os.environ.update(env)
    sys.path.insert(0, str(ROOT))
    train_env = {**env, "OMP_NUM_THREADS": str(args.fit_threads)}
    tiles = work / "tiles"
    synth = _frostvane(["synth", tiles, "--images", args.images, "--tiles-per-image", args.tiles_per_image,
                        "--seed", args.seed, "--force"], work / "synth.log", env)
    print(f"rendered {args.images} x {args.tiles_per_image} tiles in {synth:.0f} s (not timed)", flush=True)

    from distributed import LocalCluster

    start = time.perf_counter()
    with LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None) as cluster:
        cluster_start = time.perf_counter() - start
        print(f"LocalCluster of 2 workers x 1 thread at {cluster.scheduler_address} started in "
              f"{cluster_start:.1f} s (not in the runs' times)", flush=True)
        kinds = {"local": ["--workers", 2], "cluster": ["--scheduler", cluster.scheduler_address]}
        seconds = {kind: [] for kind in kinds}
        fits = {kind: [] for kind in kinds}
        models = {}
        for repeat in range(args.repeats):
            for kind, options in kinds.items():
                out, log = work / f"model_{kind}_{repeat}", work / f"train_{kind}_{repeat}.log"
                wall = _frostvane(["train", tiles, "--out", out, "--seed", args.seed, *options, "--force"], log,
                                  train_env)
                seconds[kind].append(wall)
                fits[kind].append(_fit_seconds(log))
                models[out.name] = _model_bytes(out)
                print(f"run {repeat + 1} {kind:>7}: {wall:6.1f} s (fits {fits[kind][-1]:5.1f} s, "
                      f"the rest {wall - fits[kind][-1]:5.1f} s)", flush=True)

    same = len(set(models.values())) == 1
    local, remote = statistics.median(seconds["local"]), statistics.median(seconds["cluster"])
    rest = {kind: statistics.median(w - f for w, f in zip(seconds[kind], fits[kind])) for kind in kinds}
    print(f"median: local (--workers 2) {local:.1f} s, cluster (2 Dask workers) {remote:.1f} s, "
          f"ratio cluster / local {remote / local:.2f}; without the fits {rest['local']:.1f} s and "
          f"{rest['cluster']:.1f} s, ratio {rest['cluster'] / rest['local']:.2f}; "
          f"the same ONNX files in every run: {same}")
    print(json.dumps({"tiles": args.images * args.tiles_per_image, "repeats": args.repeats,
                      "local_seconds": [round(s, 1) for s in seconds["local"]],
                      "cluster_seconds": [round(s, 1) for s in seconds["cluster"]],
                      "local_fit_seconds": [round(s, 1) for s in fits["local"]],
                      "cluster_fit_seconds": [round(s, 1) for s in fits["cluster"]],
                      "cluster_start_seconds": round(cluster_start, 1), "ratio": round(remote / local, 3),
                      "ratio_without_fits": round(rest["cluster"] / rest["local"], 3), "fit_threads": args.fit_threads,
                      "same_model": same}))
    if not same:
        sys.exit("the runs wrote different models")


if __name__ == "__main__":
    main()
