"""What the quality scripts (``shift_factors.py``, ``image_variants.py``, ``dev_sets.py``) share: their common
options, one error line and exit 2 for what cannot be read, the table's number format and common
cells, and how a run's table and figures are written."""

import argparse
import json
import sys
import time


def quality_parser(description, *, seed):
    """The options every quality script takes: a model folder, ``--out``, ``--images``, ``--seed``, ``--workers``."""
    parser = argparse.ArgumentParser(description=description)
    parser.add_argument("model", help="model folder")
    parser.add_argument("--out", required=True, help="output folder (its sets and reports are overwritten)")
    parser.add_argument("--images", type=int, default=16, help="images per set (4 tiles each), >= 1")
    parser.add_argument("--seed", type=int, default=seed)
    parser.add_argument("--workers", type=int, default=2)
    return parser


def run_reporting_errors(name, run, argv):
    """Call ``run(argv)``; a project error (a missing model, a model of another version, a bad folder)
    becomes one line ``name: message`` on stderr and exit status 2."""
    from detector.errors import DetectorError

    try:
        run(argv)
    except DetectorError as err:
        print(f"{name}: {err}", file=sys.stderr)
        sys.exit(2)


def fmt(value, digits):
    """``value`` to ``digits`` decimals; empty for a figure that could not be computed (None)."""
    return "" if value is None else f"{value:.{digits}f}"


def figure_cells(r, ref):
    """The cells every quality table shares, from one set's figures ``r`` against the reference set's
    ``ref``: fan F1 (precision / recall), its change, spot F1, its change, direction median / p90,
    per-tile mean, Dice and the share of fans missed."""
    return (f"{r['fan_f1']:.3f} ({r['fan_precision']:.2f} / {r['fan_recall']:.2f}) | "
            f"{r['fan_f1'] - ref['fan_f1']:+.3f} | {r['spot_f1']:.3f} | {r['spot_f1'] - ref['spot_f1']:+.3f} | "
            f"{fmt(r['fan_direction_median_deg'], 1)} / {fmt(r['fan_direction_p90_deg'], 1)} | "
            f"{fmt(r['tile_mean_direction_median_deg'], 1)} | {fmt(r['dice_mean'], 2)} | {100 * r['fans_missed']:.0f} % |")


def write_report(out, stem, table, args, started, key, rows, headline):
    """Write ``stem``.md (the table) and ``stem``.json (the run's options, seconds and ``rows`` under
    ``key``) in ``out``; print the table and then ``headline`` as one JSON line."""
    (out / f"{stem}.md").write_text(table)
    summary = {"model": str(args.model), "images": args.images, "seed": args.seed,
               "seconds": round(time.perf_counter() - started, 1), key: rows}
    (out / f"{stem}.json").write_text(json.dumps(summary, indent=1) + "\n")
    print(table)
    print(json.dumps(headline))
