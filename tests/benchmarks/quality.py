"""What the quality scripts (``shift_factors.py``, ``image_variants.py``) share: their common
options, one error line and exit 2 for what cannot be read, and the table's number format."""

import argparse
import sys


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
