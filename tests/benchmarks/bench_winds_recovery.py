"""Winds recovered from the crowd consensus against the winds the scene generator drew, per image.

Renders invented tile sets with training.synth (recording each image's generator winds, see
tests/training/_wind_truth.py), runs the per-image wind analysis of ``frostvane winds`` on their
consensus.csv and prints, per image, the generator's wind(s) against the recovered one(s):

    .venv/bin/python tests/benchmarks/bench_winds_recovery.py [--seed 11] [--images 8]

The second table is the shipped demo_tiles/ (regenerated with its own command, seed 2026, and
checked byte for byte against the committed consensus.csv). Prints one JSON object last.
"""

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import pandas as pd  # noqa: E402

from tests.training._wind_truth import check_record, recovery_table, synthesize_with_winds  # noqa: E402
from training.winds.wind_catalogs import read_consensus_catalog  # noqa: E402
from training.winds.winds import IMAGE_KEYS, WindSettings, summarise_groups  # noqa: E402


def _table(root, winds):
    catalog = read_consensus_catalog(root)
    images, modes, _ = summarise_groups(catalog, IMAGE_KEYS, WindSettings(), direction_column="direction_deg")
    return recovery_table(winds, images, modes)


def _markdown(table):
    cols = ["image_id", "wind_mode", "generator_to_deg", "n_fans", "n_winds", "recovered_to_deg", "rayleigh_p",
            "error_deg"]
    lines = ["| " + " | ".join(cols) + " |", "|" + " --- |" * len(cols)]
    for rec in table[cols].to_dict("records"):
        cells = [f"{v:.2g}" if k == "rayleigh_p" else f"{v:.1f}" if isinstance(v, float) else str(v)
                 for k, v in rec.items()]
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--images", type=int, default=8)
    parser.add_argument("--tiles-per-image", type=int, default=4)
    args = parser.parse_args()
    started = time.perf_counter()
    results = {}
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "generated"
        winds = synthesize_with_winds(out, n_images=args.images, tiles_per_image=args.tiles_per_image, seed=args.seed)
        print(f"record check (one-wind images, truth fans vs recorded wind): {check_record(out, winds):.1f} deg")
        generated = _table(out, winds)
        print(f"\ngenerated tile set (seed {args.seed}, {args.images} images x {args.tiles_per_image} tiles):")
        print(_markdown(generated))
        demo = Path(tmp) / "demo"
        demo_winds = synthesize_with_winds(demo, n_images=8, tiles_per_image=5, seed=2026)
        same = (demo / "consensus.csv").read_bytes() == (ROOT / "demo_tiles" / "consensus.csv").read_bytes()
        demo_table = _table(ROOT / "demo_tiles", demo_winds)
        print(f"\ndemo_tiles/ (regenerated consensus identical to the committed one: {same}):")
        print(_markdown(demo_table))
    for name, table in (("generated", generated), ("demo", demo_table)):
        results[name] = {mode: float(g["error_deg"].max()) if g["error_deg"].notna().any() else None
                         for mode, g in table.groupby("wind_mode")}
    results["seconds"] = round(time.perf_counter() - started, 1)
    print(json.dumps({"max_error_deg_by_scene": results}))


if __name__ == "__main__":
    pd.set_option("display.width", 200)
    main()
