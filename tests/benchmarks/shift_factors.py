"""Which of the shifted settings costs a model what: one generator factor shifted at a time.

Not a test: run by hand, e.g.

    python tests/benchmarks/shift_factors.py models/demo --out out/shift_factors
    python tests/benchmarks/shift_factors.py MODEL --out DIR --images 16 --any-score

The benchmark's shifted set moves every setting at once (terrain, deposit contrast, image gain, blur,
noise, the mix of fan kinds), so its table says how much a model loses, not why. This script renders,
from one seed, a set of nominal scenes, one set per group of settings in which only that group takes
the shifted profile's values (``training.synth.SCENE_PROFILES``) and one with all of them, then scores the model on each with
``frostvane evaluate`` at its own threshold. With ``--any-score`` every set is scored again with every
candidate kept (``--min-score 0``): a consensus fan matched there but not at the threshold was found
and scored too low, one missed there was never found.

Every setting in which the two profiles differ belongs to exactly one group (checked before anything
is rendered), so a change to the profiles cannot slip past it. The sets are rendered with their own
image prefix (``FX...``) and seed, never the benchmark's. Writes ``factors.md`` and ``factors.json``
under ``--out``; the last line printed is one JSON object.
"""

import dataclasses
import sys
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]

#: Settings shifted together, by what they stand for; "nominal" shifts none.
GROUPS = {
    "nominal": (),
    "terrain": ("polygon_probability", "polygon_cover", "polygon_cell_px", "polygon_trough_px", "polygon_depth",
                "araneiform_share", "araneiform_bare_per_mpx", "troughs_per_mpx", "rough_patches_per_mpx",
                "craters_per_mpx", "vent_on_trough_share", "spot_with_fans_share"),
    "deposit contrast": ("fan_contrast", "faint_contrast", "broad_fan_contrast"),
    "image gain": ("gain", "level", "faint_gain", "faint_level"),
    "blur": ("blur_sigma_px",),
    "noise": ("noise_dn",),
    "fan mix": ("short_fan_share", "short_fan_px", "broad_fan_share", "broad_fan_length_px",
                "broad_fan_opening_deg"),
}


def _check_groups(nominal, shifted):
    fields = [f.name for f in dataclasses.fields(nominal)]
    grouped = [name for names in GROUPS.values() for name in names]
    unknown = sorted(set(grouped) - set(fields))
    differ = [name for name in fields if getattr(nominal, name) != getattr(shifted, name)]
    loose = [name for name in differ if name not in grouped]
    if unknown or loose or len(grouped) != len(set(grouped)):
        sys.exit(f"shift_factors: settings groups out of date (unknown {unknown}, ungrouped {loose}); edit GROUPS.")
    return differ


def main(argv=None):
    sys.path.insert(0, str(REPO))
    from tests.benchmarks.quality import run_reporting_errors

    run_reporting_errors("shift_factors", _run, argv)


def _run(argv):
    from tests.benchmarks.quality import figure_cells, quality_parser, write_report

    parser = quality_parser(__doc__.splitlines()[0], seed=9090)
    parser.add_argument("--any-score", action="store_true", help="also score with every candidate kept")
    args = parser.parse_args(argv)
    from detector.inference.model import load_model
    from training.synth import SCENE_PROFILES, synthesize_tileset
    from training.evaluation.benchmark import report_figures
    from training.evaluation.evaluate import evaluate_model

    load_model(args.model)  # refused here, before anything is rendered, if it cannot be read

    nominal, shifted = SCENE_PROFILES["nominal"], SCENE_PROFILES["shifted"]
    differ = _check_groups(nominal, shifted)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rows, started = {}, time.perf_counter()
    plan = list(GROUPS.items()) + [("all together", tuple(differ))]
    for k, (group, names) in enumerate(plan):
        moved = [n for n in names if n in differ]
        if group != "nominal" and not moved:
            continue
        settings = dataclasses.replace(nominal, **{n: getattr(shifted, n) for n in moved})
        slug = group.replace(" ", "_")
        root = out / "sets" / slug
        print(f"[{k + 1}/{len(plan)}] {group}: rendering {args.images} images ({', '.join(moved) or 'nothing shifted'})",
              flush=True)
        synthesize_tileset(root, n_images=args.images, tiles_per_image=4, seed=args.seed, settings=settings,
                           image_prefix="FX_" + slug.upper(), force=True)
        report = evaluate_model(args.model, root, out / "reports" / slug, force=True, workers=args.workers,
                                log=lambda *a: None)
        rows[group] = {"settings": moved, "threshold": report_figures(report)}
        if args.any_score:
            report = evaluate_model(args.model, root, out / "reports" / f"{slug}_any", force=True,
                                    workers=args.workers, min_score=0.0, log=lambda *a: None)
            rows[group]["any_score"] = report_figures(report)
        print(f"    fan F1 {rows[group]['threshold']['fan_f1']:.3f}, {time.perf_counter() - started:.0f} s", flush=True)

    base = rows["nominal"]["threshold"]
    lines = [
        "# Shifted settings one group at a time\n",
        f"Model `{args.model}`; {args.images} images of 4 tiles per set, seed {args.seed}; scored at the model's "
        "threshold. Change = against the nominal set of the same seed.\n",
        "| shifted group | fan F1 (P / R) | change | spot F1 | change | direction median / p90 | per-tile mean | "
        "Dice | fans missed | spots missed |" + (" fans matched, any score | spots matched, any score |"
                                                 if args.any_score else ""),
        "| --- " * (10 + 2 * args.any_score) + "|",
    ]
    for group, entry in rows.items():
        r = entry["threshold"]
        line = f"| {group} | {figure_cells(r, base)} {100 * r['spots_missed']:.0f} % |"
        if args.any_score:
            a = entry["any_score"]
            line += f" {100 * a['fans_matched']:.0f} % | {100 * a['spots_matched']:.0f} % |"
        lines.append(line)
    table = "\n".join(lines) + "\n"
    write_report(out, "factors", table, args, started, "groups", rows,
                 {g: round(e["threshold"]["fan_f1"], 4) for g, e in rows.items()})


if __name__ == "__main__":
    main()
