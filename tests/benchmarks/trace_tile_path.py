"""The path of one tile through ``detect_tile``: which modules it passes, in order, and how often it comes back.

Every Python call made under :func:`detector.detect_tile` on one demo tile is recorded with the module
that defines the called function (``sys.setprofile``; only the project's own modules, so numpy, scipy,
onnxruntime and the compiled loops themselves do not appear); consecutive calls in the same module are
collapsed into one visit. A reader following the tile from the top function downwards leaves a module
and comes back to it once for every visit beyond the first; the script prints the path, the number of
visits, of modules and of such returns, and a JSON line of the figures::

    python tests/benchmarks/trace_tile_path.py [--tile TILE_ID]

It uses only the top-level API (``detector.load_tileset``, ``load_model``, ``detect_tile``), so the
same script measures any checkout (``PYTHONPATH=CHECKOUT``). The first call warms the compiled loops'
cache and the model; the second is traced.
"""

import argparse
import json
import sys
from collections import Counter
from pathlib import Path

import detector
from detector import detect_tile, load_model, load_tileset

ROOT = Path(detector.__file__).resolve().parent.parent
PROJECT = ("detector", "training", "frostvane")

#: The stage of each module of the per-tile pipeline, by its file name, so that one table serves the
#: flat layout (``detector.features``) and the one by stage (``detector.tile.features``).
STAGES = {"features": "tile", "_dense": "tile", "_kernels": "tile", "spec": "tile",
          "assemble": "objects", "_readings": "objects",
          "detect": "inference", "model": "inference", "card": "inference", "unfamiliar": "inference"}


def collapse(items):
    """``items`` with consecutive repeats removed."""
    return [x for i, x in enumerate(items) if i == 0 or items[i - 1] != x]


def figures(path):
    """Visits, modules and returns to a module already left, of a collapsed path."""
    return {"visits": len(path), "modules": len(set(path)), "returns": len(path) - len(set(path))}


def trace(model, tile, tile_id):
    """Modules of the project's Python calls under ``detect_tile``, consecutive repeats collapsed."""
    path = []

    def profile(frame, event, arg):
        if event != "call":
            return
        module = frame.f_globals.get("__name__", "")
        if module.split(".")[0] in PROJECT and (not path or path[-1] != module):
            path.append(module)

    sys.setprofile(profile)
    try:
        detect_tile(model, tile, tile_id=tile_id)
    finally:
        sys.setprofile(None)
    return path


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tile", default=None, help="Demo tile id (default: the first tile with consensus fans).")
    parser.add_argument("--full", action="store_true", help="Print the whole module path (a few hundred visits).")
    args = parser.parse_args(argv)
    tileset = load_tileset(ROOT / "demo_tiles")
    tile_id = args.tile or str(tileset.consensus["tile_id"].iloc[0])
    model = load_model(ROOT / "models" / "demo")
    tile = tileset.read_tile(tile_id)
    detect_tile(model, tile, tile_id=tile_id)  # warm-up: compiled loops, sessions
    path = trace(model, tile, tile_id)
    stages = collapse([STAGES.get(m.rsplit(".", 1)[-1], "shared") for m in path])
    visits = Counter(path)
    first = list(dict.fromkeys(path))
    print(f"tile {tile_id}, code in {ROOT}")
    if args.full:
        print("path: " + " -> ".join(path))
    print("modules in order of first entry: " + " -> ".join(first))
    print("visits per module: " + ", ".join(f"{m} {n}" for m, n in visits.most_common()))
    by_module, by_stage = figures(path), figures(stages)
    print(f"modules: {by_module['visits']} visits to {by_module['modules']} modules, "
          f"{by_module['returns']} returns to a module already left")
    print(f"stages (tile, objects, inference; shared = geometry, circstats, errors, ...): {by_stage['visits']} "
          f"visits to {by_stage['modules']} stages, {by_stage['returns']} returns to a stage already left")
    # Without the shared helpers (a direction conversion per reading), the stage path is short enough to read.
    pipeline = collapse([s for s in stages if s != "shared"])
    by_pipeline = figures(pipeline)
    shown = pipeline if args.full or len(pipeline) <= 24 else pipeline[:24] + [f"... ({len(pipeline) - 24} more)"]
    print("stages without the shared helpers: " + " -> ".join(shown))
    print(f"stages without the shared helpers: {by_pipeline['visits']} visits, {by_pipeline['returns']} returns")
    print(json.dumps({"tile_id": tile_id, "by_module": by_module, "by_stage": by_stage,
                      "by_stage_without_shared": by_pipeline, "first_entry": first}))

if __name__ == "__main__":
    main()
