"""Subcommands of ``frostvane`` that need only the detector: ``validate`` and ``screen``."""

from pathlib import Path

from .contract import DEFAULT_MIN_VOTES

__all__ = ["add_detector_commands"]


def _tile_size(text):
    try:
        width, height = (int(v) for v in text.lower().split("x"))
    except ValueError:
        raise ValueError(f"tile size {text!r} is not WIDTHxHEIGHT, e.g. 800x600") from None
    return width, height


def add_detector_commands(commands):
    """Register ``validate`` and ``screen`` on an argparse subparsers object."""
    validate = commands.add_parser("validate", help="Check a tile set against the contract; print its summary.")
    validate.add_argument("tile_set", type=Path, help="Tile-set folder (tiles.csv, consensus.csv, images).")
    validate.add_argument("--min-votes", type=int, default=DEFAULT_MIN_VOTES,
                          help="Drop consensus features with fewer votes (common practice: 3).")
    validate.set_defaults(func=_validate)

    screen = commands.add_parser("screen", help="Screen images or tile sets; write the screening folder.")
    screen.add_argument("model_dir", type=Path, help="Model folder (model.json and its ONNX files).")
    screen.add_argument("inputs", type=Path, nargs="+", metavar="INPUT",
                        help="Image files (any raster GDAL reads) and/or tile-set folders.")
    screen.add_argument("--out", type=Path, required=True, help="Screening folder to write (or to continue).")
    screen.add_argument("--tile", type=_tile_size, default="800x600", help="Tile size WIDTHxHEIGHT, px.")
    screen.add_argument("--overlap", type=int, default=32, help="Margin read around each tile, px.")
    screen.add_argument("--workers", type=int, default=1, help="Local worker processes.")
    screen.add_argument("--scheduler", default=None, help="Address of a running Dask distributed scheduler.")
    screen.add_argument("--nodata", default=None, metavar="VALUE",
                        help="Pixel value marking no data: a number, or 'none' when no value does (NaN pixels "
                        "of float images always do). Default: the raster's own no-data value, else 0, the fill "
                        "of map-projected products; say 'none' for products whose darkest pixels are clipped to 0.")
    screen.add_argument("--band", type=int, default=None, help="1-based band of a multi-band image.")
    screen.add_argument("--any-body", action="store_true",
                        help="Screen a raster whose CRS is not on Mars (refused otherwise).")
    screen.add_argument("--force", action="store_true",
                        help="Discard what the output folder holds (another or unfinished run) and start afresh.")
    screen.set_defaults(func=_screen)


def _validate(args):
    from .tileset import format_summary, load_tileset, summarize_tileset

    tileset = load_tileset(args.tile_set, min_votes=args.min_votes)
    print(format_summary(summarize_tileset(tileset)))


def _screen(args):
    from .screening.screen import screen_command

    screen_command(args)
