"""The development sets a change to the detector is chosen on: two nominal and two shifted sets.

Not a test: run by hand, e.g.

    python tests/benchmarks/dev_sets.py models/demo --out out/dev_sets
    python tests/benchmarks/dev_sets.py MODEL --out DIR2 --sets out/dev_sets/sets --against out/dev_sets/dev_sets.json

The benchmark's held-out and shifted images judge a change once it is chosen; they never choose it.
Choosing is done here: two pairs of sets (a nominal and a shifted set from each of two seeds, none the
benchmark's, with their own image prefix ``DV``), each scored with ``frostvane evaluate`` at the
model's own threshold. A change is worth a benchmark run when it helps on the sets it is aimed at and
costs nothing beyond a retrain's own spread on the others (README, "Benchmark": the shipped code
retrained with another seed moved fan F1 here by -0.020 to +0.011 and on the benchmark by 0.007).

``--seed S`` moves every set's seed by S (another family of sets; default 0, the sets above).
``--sets DIR`` reuses sets rendered by an earlier run (each set folder holds the settings it was
rendered with, checked before reuse), so a model built from another checkout is scored on the very
same tiles; ``--against JSON`` takes an earlier run's ``dev_sets.json`` as the reference of the change
columns (default: each set's own figures, change 0). Writes ``dev_sets.md`` and
``dev_sets.json`` under ``--out``; the last line printed is one JSON object.
"""

import json
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]

#: (name, generator profile, seed) of each development set.
DEV_SETS = (
    ("nominal A", "nominal", 321),
    ("shifted A", "shifted", 123),
    ("nominal B", "nominal", 4444),
    ("shifted B", "shifted", 4444),
)

_STAMP = "dev_set.json"


def main(argv=None):
    sys.path.insert(0, str(REPO))
    from tests.benchmarks.quality import run_reporting_errors

    run_reporting_errors("dev_sets", _run, argv)


def _render(root, profile, seed, images):
    """Render one development set into ``root``, or reuse the one there when it was rendered the same way."""
    from training.synth import synthesize_tileset

    wanted = {"profile": profile, "seed": seed, "images": images, "tiles_per_image": 4}
    stamp = root / _STAMP
    if stamp.is_file() and json.loads(stamp.read_text()) == wanted:
        return False
    synthesize_tileset(root, n_images=images, tiles_per_image=4, seed=seed, settings=profile,
                       image_prefix="DV_" + profile[:3].upper() + str(seed), force=True)
    stamp.write_text(json.dumps(wanted) + "\n")
    return True


def _run(argv):
    from tests.benchmarks.quality import figure_cells, fmt, quality_parser, write_report

    parser = quality_parser(__doc__.splitlines()[0], seed=0)
    parser.set_defaults(images=24)
    parser.add_argument("--sets", help="folder of the rendered sets (default: OUT/sets); reused when it holds them")
    parser.add_argument("--against", help="an earlier run's dev_sets.json: the reference of the change columns")
    args = parser.parse_args(argv)
    if args.images < 1:
        parser.error(f"--images must be >= 1; got {args.images}")
    from detector.errors import DetectorError
    from detector.inference.model import load_model
    from training.evaluation.benchmark import report_figures
    from training.evaluation.evaluate import evaluate_model

    load_model(args.model)  # refused here, before anything is rendered, if it cannot be read
    reference = None
    if args.against:
        try:
            reference = json.loads(Path(args.against).read_text())["sets"]
        except (OSError, ValueError, KeyError, TypeError) as err:
            raise DetectorError(f"--against {args.against!r} is not a dev_sets.json of an earlier run ({err}).") from err
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    sets_root = Path(args.sets) if args.sets else out / "sets"
    rows, started = {}, time.perf_counter()
    for k, (name, profile, seed) in enumerate(DEV_SETS):
        seed += args.seed
        slug = name.replace(" ", "_")
        rendered = _render(sets_root / slug, profile, seed, args.images)
        print(f"[{k + 1}/{len(DEV_SETS)}] {name}: {'rendered' if rendered else 'reused'} {args.images} images "
              f"({profile}, seed {seed}); scoring...", flush=True)
        report = evaluate_model(args.model, sets_root / slug, out / "reports" / slug, force=True,
                                workers=args.workers, log=lambda *a: None)
        rows[name] = report_figures(report)
        print(f"    fan F1 {rows[name]['fan_f1']:.3f}, spot F1 {rows[name]['spot_f1']:.3f}, "
              f"{time.perf_counter() - started:.0f} s", flush=True)

    lines = [
        "# Development sets\n",
        f"Model `{args.model}`; {args.images} images of 4 tiles per set; scored at the model's threshold. "
        + (f"Change = against `{args.against}`." if reference else "Change = against itself (no --against).") + "\n",
        "| set | fan F1 (P / R) | change | spot F1 | change | direction median / p90 | per-tile mean | Dice | "
        "fans missed | flips | covered-fraction error, pp |",
        "| --- " * 11 + "|",
    ]
    for name, r in rows.items():
        ref = (reference or {}).get(name) or r
        lines.append(f"| {name} | {figure_cells(r, ref)} {fmt(None if r['flip_rate'] is None else 100 * r['flip_rate'], 1)} % | "
                     f"{fmt(r['covered_error_pp_mean'], 2)} |")
    table = "\n".join(lines) + "\n"
    write_report(out, "dev_sets", table, args, started, "sets", rows,
                 {name: round(r["fan_f1"], 4) for name, r in rows.items()})


if __name__ == "__main__":
    main()
