"""The ``frostvane`` command line, all of it: a thin layer over the library API.

Every subcommand maps its options one to one onto a library call; errors caused
by input become one line on stderr and exit code 2.
"""

import argparse
import sys
from pathlib import Path

from detector.contract import DEFAULT_MIN_VOTES
from detector.errors import DetectorError
from detector.inference.unfamiliar import DEFAULT_PASS_SHARE

from training.effort.routing import DEFAULT_MAX_DIRECTION_ERROR, DEFAULT_MIN_F1, DEFAULT_RECALL

from training.winds.winds import FRAMES as WIND_FRAMES
from training.winds.winds import RESAMPLE_UNITS as WIND_RESAMPLE_UNITS
from training.winds.winds import WEIGHTINGS as WIND_WEIGHTINGS
from training.winds.winds import WindSettings

WIND_DEFAULTS = WindSettings()

__all__ = ["main"]

DEFAULT_MODEL = Path(__file__).resolve().parent.parent / "models" / "demo"
DEFAULT_DEMO_TILES = Path(__file__).resolve().parent.parent / "demo_tiles"


_AT_MODEL_SCALE_HELP = ("Read a tile whose metres_per_px (tiles.csv, or a projected raster's pixel size) lies "
                        "outside the ground scale of the model's fitting tiles resampled to it, e.g. a 2 x 2 binned "
                        "image with a model of full-resolution tiles (default: every tile as it is).")


def _image_list(text):
    return tuple(part.strip() for part in text.split(",") if part.strip())


def _tile_size(text):
    try:
        width, height = (int(v) for v in text.lower().split("x"))
    except ValueError:
        raise ValueError(f"tile size {text!r} is not WIDTHxHEIGHT, e.g. 800x600") from None
    return width, height


def _add_detector_commands(commands):
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
    screen.add_argument("--at-model-scale", action="store_true", help=_AT_MODEL_SCALE_HELP)
    screen.set_defaults(func=_screen)


def _validate(args):
    from detector.tileset import format_summary, load_tileset, summarize_tileset

    tileset = load_tileset(args.tile_set, min_votes=args.min_votes)
    print(format_summary(summarize_tileset(tileset)))


def _screen(args):
    from detector.screening import screen

    summary = screen(args.model_dir, args.inputs, args.out, tile=tuple(args.tile), overlap=args.overlap,
                     workers=args.workers, scheduler=args.scheduler, nodata=args.nodata, band=args.band,
                     any_body=args.any_body, force=args.force, at_model_scale=args.at_model_scale)
    print(summary.format())


def _count_of(name):
    """An option type for a count: a whole number >= 1, refused naming the option otherwise."""
    def count(text):
        try:
            value = int(text)
        except ValueError:
            value = 0
        if value < 1:
            raise argparse.ArgumentTypeError(f"{name} {text!r} must be a whole number >= 1")
        return value
    return count


#: ``--workers`` (joblib would read -1 as every core and 0 as nothing) and ``--repeats`` (each repeat
#: is one seeded split).
_worker_count = _count_of("workers")
_repeat_count = _count_of("repeats")


def _add_training_commands(commands):
    synth = commands.add_parser("synth", help="Render an invented synthetic tile set with truth and consensus.")
    synth.add_argument("out", type=Path, help="Folder of the new tile set.")
    synth.add_argument("--images", type=int, default=8, help="Invented source images.")
    synth.add_argument("--tiles-per-image", type=int, default=5, help="Tiles cut from each image.")
    synth.add_argument("--seed", type=int, default=0, help="Seed of the scene generator.")
    synth.add_argument("--profile", choices=("nominal", "shifted"), default="nominal",
                       help="Scene settings: the training distribution, or one shifted outside it.")
    synth.add_argument("--force", action="store_true", help="Replace a non-empty output folder.")
    synth.set_defaults(func=_synth)

    train = commands.add_parser("train", help="Train a model on a tile set with consensus; write MODEL_DIR.")
    train.add_argument("tile_set", type=Path, help="Tile set with consensus.csv to learn from.")
    train.add_argument("--out", type=Path, required=True, help="Model folder to write.")
    train.add_argument("--seed", type=int, default=0, help="Seed of the split, sampling and fitting.")
    hold = train.add_mutually_exclusive_group()
    hold.add_argument("--holdout-fraction", type=float, default=0.2,
                      help="Share of the images held out for scoring the model card.")
    hold.add_argument("--holdout-images", type=_image_list, default="",
                      help="Comma-separated image ids to hold out instead of a random share.")
    train.add_argument("--max-patches", type=int, default=300_000, help="Most patches the classifier learns from.")
    train.add_argument("--min-votes", type=int, default=DEFAULT_MIN_VOTES,
                       help="Drop consensus features with fewer votes (common practice: 3).")
    train.add_argument("--workers", type=_worker_count, default=1,
                       help="Local worker processes for feature extraction, candidate readings and scoring.")
    train.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="Address of a running Dask distributed scheduler (e.g. tcp://10.0.0.5:8786): the same "
                       "work runs on its cluster instead, whose workers must see the tile set and the output "
                       "folder by the same absolute paths; overrides --workers.")
    train.add_argument("--force", action="store_true", help="Replace an existing model folder.")
    train.set_defaults(func=_train)

    evaluate = commands.add_parser("evaluate", help="Score a model on a labelled tile set; write REPORT_DIR.")
    evaluate.add_argument("model_dir", type=Path, help="Model folder.")
    evaluate.add_argument("tile_set", type=Path, help="Labelled tile set to score it on.")
    evaluate.add_argument("--out", type=Path, required=True, help="Report folder to write.")
    evaluate.add_argument("--min-score", type=float, default=None,
                          help="Smallest detection score kept (default: the model's tuned threshold, else 0.5).")
    evaluate.add_argument("--workers", type=_worker_count, default=1, help="Local worker processes.")
    evaluate.add_argument("--force", action="store_true", help="Replace a non-empty report folder.")
    evaluate.add_argument("--at-model-scale", action="store_true", help=_AT_MODEL_SCALE_HELP)
    evaluate.set_defaults(func=_evaluate)

    effort = commands.add_parser("effort", help="Route screened tiles and estimate the volunteer effort left.")
    effort.add_argument("model_dir", type=Path, help="Model folder (its held-out table sets the routes).")
    effort.add_argument("screen_dir", type=Path, nargs="?", help="Output of frostvane screen, made by this model.")
    _add_campaign_options(effort)
    effort.add_argument("--recall", type=float, default=DEFAULT_RECALL,
                        help="Share of the held-out deposit area the skip route must keep.")
    effort.add_argument("--min-f1", type=float, default=DEFAULT_MIN_F1,
                        help="Pooled object F1 the machine route promises on held-out tiles.")
    effort.add_argument("--max-direction-error", type=float, default=DEFAULT_MAX_DIRECTION_ERROR,
                        help="Median fan direction error the machine route promises, degrees.")
    effort.add_argument("--pass-share", type=float, default=DEFAULT_PASS_SHARE,
                        help="Share of held-out tiles that pass the unfamiliarity check.")
    effort.add_argument("--next-tiles", type=Path, metavar="TILESET", default=None,
                        help="Rank the crowd tiles found in this tile set by what they would teach the model.")
    effort.add_argument("--learning-curve", type=Path, metavar="TILESET", default=None,
                        help="Also fit the learning curve on this labelled tile set.")
    effort.add_argument("--out", type=Path, default=None,
                        help="Folder for effort.json, routes.csv and the plots (default: the screening folder).")
    effort.add_argument("--seed", type=int, default=0, help="Seed of the bootstrap and the learning curve.")
    effort.set_defaults(func=_effort)

    backtest = commands.add_parser("backtest", help="Hide a labelled tile set's consensus, screen and estimate "
                                   "effort, and compare with the hidden catalog.")
    backtest.add_argument("model_dir", type=Path, help="Model folder; it must never have seen the tile set's images.")
    backtest.add_argument("tile_set", type=Path, help="Labelled tile set: its consensus is the hidden catalog.")
    backtest.add_argument("--out", type=Path, required=True, help="Folder for the screening and backtest.md / .json.")
    _add_campaign_options(backtest, classifications=False)
    backtest.add_argument("--workers", type=_worker_count, default=1, help="Screening processes.")
    backtest.add_argument("--seed", type=int, default=0, help="Seed of the campaign states and the bootstrap.")
    backtest.set_defaults(func=_backtest)

    order = commands.add_parser("labelling-order", help="Retrain on a pool in ranked and random labelling order "
                                "and compare the learning curves.")
    order.add_argument("model_dir", type=Path, help="Model that ranks the pool's tiles.")
    order.add_argument("tile_set", type=Path, help="Labelled tile set split into start, pool and held-out images.")
    order.add_argument("--out", type=Path, required=True, help="Folder for labelling_order.json and .png.")
    order.add_argument("--base-images", type=int, default=3, help="Images labelled at the start.")
    order.add_argument("--holdout-images", type=int, default=6, help="Images every run of a split is scored on.")
    order.add_argument("--batch", type=int, default=6, help="Pool tiles added before each retraining.")
    order.add_argument("--batches", type=int, default=2, help="Number of batches.")
    order.add_argument("--max-patches", type=int, default=20000, help="Patch cap of each small training run.")
    order.add_argument("--workers", type=_worker_count, default=1, help="Feature extraction processes.")
    order.add_argument("--seed", type=int, default=0, help="Seed of the first split and its random order; split i "
                       "uses seed + i.")
    order.add_argument("--repeats", type=_repeat_count, default=8,
                       help="Seeded splits (start, held-out and pool images) the study is repeated over; the "
                       "intervals need at least 2.")
    order.set_defaults(func=_labelling_order)

    bench = commands.add_parser("benchmark", help="Build the fixed benchmark, or score a model on it.")
    bench_commands = bench.add_subparsers(dest="benchmark_command", required=True)
    build = bench_commands.add_parser("build", help="Render the benchmark's train, held-out, shifted and negative sets.")
    build.add_argument("out", type=Path, help="Benchmark folder to write.")
    build.add_argument("--seed", type=int, default=7, help="Seed of every set.")
    build.add_argument("--train-images", type=int, default=240, help="Images of the train set.")
    build.add_argument("--heldout-images", type=int, default=40, help="Images of the held-out set.")
    build.add_argument("--shifted-images", type=int, default=20, help="Images of the shifted set.")
    build.add_argument("--tiles-per-image", type=int, default=4, help="Tiles cut from each image.")
    build.add_argument("--force", action="store_true", help="Replace a non-empty output folder.")
    build.set_defaults(func=_benchmark_build)
    run = bench_commands.add_parser("run", help="Score a model on a benchmark; print and write the table.")
    run.add_argument("model_dir", type=Path, help="Model folder.")
    run.add_argument("bench", type=Path, help="Benchmark folder (frostvane benchmark build).")
    run.add_argument("--out", type=Path, required=True, help="Folder for benchmark.md and benchmark.json.")
    run.add_argument("--min-score", type=float, default=None,
                     help="Smallest detection score kept (default: the model's tuned threshold).")
    run.add_argument("--workers", type=_worker_count, default=2, help="Local worker processes.")
    run.add_argument("--compare", nargs=2, action="append", metavar=("LABEL", "BENCHMARK_JSON"), default=[],
                     help="Set the model columns of an earlier benchmark.json beside this run's.")
    run.add_argument("--force", action="store_true", help="Replace a non-empty output folder.")
    run.set_defaults(func=_benchmark_run)

    winds = commands.add_parser(
        "winds", help="Surface winds by region and solar-longitude bin from fan catalogs; write tables, GIS and plots.")
    winds.add_argument("--crowd", type=Path, default=None, metavar="TILESET",
                       help="Tile set whose consensus.csv is the crowd catalog (its tiles.csv also places the machine's).")
    winds.add_argument("--machine", type=Path, nargs="+", default=[], metavar="PATH",
                       help="Screening folder(s), or one evaluation's detections.csv (or its folder).")
    winds.add_argument("--tiles", type=Path, default=None, metavar="TILESET",
                       help="Tile set giving regions, solar longitudes and tile sizes of the machine catalog "
                            "(default: --crowd).")
    winds.add_argument("--images", type=Path, default=None, metavar="CSV",
                       help="Image table: image_id, solar_longitude_deg[, region, metres_per_px, lon_deg, lat_deg].")
    winds.add_argument("--model-winds", type=Path, default=None, metavar="CSV",
                       help="Modelled winds to compare with (format in README, 'Winds by region and season').")
    winds.add_argument("--out", type=Path, required=True, help="Folder for the wind tables, GIS layers and plots.")
    winds.add_argument("--ls-bin", type=float, default=WIND_DEFAULTS.ls_bin_deg,
                       help="Solar-longitude bin width, deg (default %(default)s).")
    winds.add_argument("--weighting", choices=WIND_WEIGHTINGS, default=WIND_DEFAULTS.weighting,
                       help="How each fan counts in a bin's wind: by length, direction confidence, both or equally.")
    winds.add_argument("--resample", choices=WIND_RESAMPLE_UNITS, default=WIND_DEFAULTS.resample,
                       help="Bootstrap unit (default: tiles, the independent unit).")
    winds.add_argument("--bootstrap", type=int, default=WIND_DEFAULTS.n_boot, help="Bootstrap replicates.")
    winds.add_argument("--bootstrap-modes", type=int, default=WIND_DEFAULTS.n_boot_modes,
                       help="Bootstrap replicates of the one- and two-wind fits.")
    winds.add_argument("--frame", choices=WIND_FRAMES, default=WIND_DEFAULTS.frame,
                       help="Directions as azimuths from north (where every fan has one) or from image up.")
    winds.add_argument("--north-up", action="store_true",
                       help="The images are map-projected north-up: image up is north (needed to compare "
                            "image directions with model winds).")
    winds.add_argument("--min-fans", type=int, default=WIND_DEFAULTS.min_fans,
                       help="Fewest fans of each catalog for a bin to enter the machine-crowd comparison.")
    winds.add_argument("--model-ls-tolerance", type=float, default=None,
                       help="Largest Ls difference of a model row from a bin's centre, deg (default: half a bin).")
    winds.add_argument("--model-max-km", type=float, default=WIND_DEFAULTS.model_max_km,
                       help="Largest distance of a lon/lat model row from a bin's centroid, km.")
    winds.add_argument("--min-votes", type=int, default=DEFAULT_MIN_VOTES,
                       help="Drop consensus features with fewer votes (common practice: 3).")
    winds.add_argument("--seed", type=int, default=0, help="Seed of the bootstrap.")
    winds.add_argument("--force", action="store_true", help="Replace a non-empty output folder.")
    winds.set_defaults(func=_winds)

    demo = commands.add_parser("demo", help="Run the whole job on the shipped demo tiles and model.")
    demo.add_argument("--out", type=Path, default=Path("out/demo"), help="Folder for everything the demo writes.")
    demo.add_argument("--tiles", type=Path, default=DEFAULT_DEMO_TILES, help="Labelled tile set of the demo.")
    demo.add_argument("--model", type=Path, default=DEFAULT_MODEL, help="Model to run.")
    demo.add_argument("--retrain", action="store_true", help="Train a fresh model instead of using the shipped one.")
    demo.set_defaults(func=_demo)


def _iso_date(text):
    import datetime

    try:
        return datetime.date.fromisoformat(text)
    except ValueError as err:
        raise argparse.ArgumentTypeError(f"{text!r} is not an ISO date (YYYY-MM-DD)") from err


def _add_campaign_options(parser, *, classifications=True):
    """Campaign options; each overrides the same key of --campaign FILE (see README, "Campaign file")."""
    parser.add_argument("--campaign", type=Path, default=None, metavar="FILE",
                        help="Campaign file (.json or .toml) with the keys below.")
    parser.add_argument("--classifications-needed", type=int, default=None,
                        help="Classifications before a tile's consensus is final (default 30: common practice 20-30).")
    if classifications:
        parser.add_argument("--classifications", type=Path, default=None, metavar="TILESET_OR_CSV",
                            help="What each tile already has: a tile set (its classifications column) or a CSV "
                                 "tile_id,classifications.")
    parser.add_argument("--seconds-per-classification", type=float, default=None,
                        help="Volunteer time per classification, s (default: 60 s, said to be assumed).")
    parser.add_argument("--classifications-per-day", type=float, default=None,
                        help="Volunteer throughput; gives the effort left as a date range.")
    parser.add_argument("--start-date", type=_iso_date, default=None,
                        help="First day of the remaining work, YYYY-MM-DD (default: today).")


def _synth(args):
    from training.synth import synthesize_tileset

    path = synthesize_tileset(args.out, n_images=args.images, tiles_per_image=args.tiles_per_image,
                              seed=args.seed, force=args.force, settings=args.profile)
    print(f"wrote synthetic tile set {path} ({args.profile} profile)")


def _train(args):
    from training.fitting.train import TrainConfig, format_card_summary, train_model

    config = TrainConfig(seed=args.seed, holdout_fraction=args.holdout_fraction,
                         holdout_images=tuple(args.holdout_images), max_patches=args.max_patches,
                         min_votes=args.min_votes, workers=args.workers, scheduler=args.scheduler)
    card = train_model(args.tile_set, args.out, config, force=args.force)
    print(format_card_summary(card, args.out))


def _evaluate(args):
    from training.evaluation.evaluate import evaluate_model

    evaluate_model(args.model_dir, args.tile_set, args.out, min_score=args.min_score, force=args.force,
                   workers=args.workers, at_model_scale=args.at_model_scale)
    print(f"report: {args.out / 'report.md'}")


def _campaign_overrides(args):
    """The campaign options given on the command line; each overrides the same key of --campaign FILE."""
    return dict(classifications_needed=args.classifications_needed,
                seconds_per_classification=args.seconds_per_classification,
                classifications_per_day=args.classifications_per_day, start_date=args.start_date,
                classifications=getattr(args, "classifications", None))


def _effort(args):
    from training.effort.effort import write_effort_outputs

    write_effort_outputs(args.model_dir, args.screen_dir, campaign_file=args.campaign,
                         campaign_overrides=_campaign_overrides(args), out=args.out, recall=args.recall,
                         min_f1=args.min_f1, max_direction_error=args.max_direction_error,
                         pass_share=args.pass_share, next_tiles=args.next_tiles,
                         learning_curve_root=args.learning_curve, seed=args.seed)


def _backtest(args):
    from training.effort.backtest import backtest
    from training.effort.campaign import campaign_with_overrides

    campaign = campaign_with_overrides(args.campaign, **_campaign_overrides(args))
    backtest(args.model_dir, args.tile_set, args.out, campaign=campaign, seed=args.seed,
             workers=args.workers)


def _labelling_order(args):
    from training.effort.active import labelling_order_study

    labelling_order_study(args.model_dir, args.tile_set, args.out, base_images=args.base_images,
                          holdout_images=args.holdout_images, batch=args.batch, n_batches=args.batches,
                          seed=args.seed, repeats=args.repeats, max_patches=args.max_patches,
                          workers=args.workers)


def _benchmark_build(args):
    from training.evaluation.benchmark import BenchmarkLayout, build_benchmark

    layout = BenchmarkLayout(seed=args.seed, train_images=args.train_images, heldout_images=args.heldout_images,
                             shifted_images=args.shifted_images, tiles_per_image=args.tiles_per_image)
    build_benchmark(args.out, layout, force=args.force)


def _benchmark_run(args):
    from training.evaluation.benchmark import run_benchmark

    run_benchmark(args.model_dir, args.bench, args.out, workers=args.workers, min_score=args.min_score,
                  compare=[tuple(pair) for pair in args.compare], force=args.force)


def _winds(args):
    from training.winds.winds import run_winds

    settings = WindSettings(ls_bin_deg=args.ls_bin, weighting=args.weighting, resample=args.resample,
                            n_boot=args.bootstrap, n_boot_modes=args.bootstrap_modes, frame=args.frame,
                            north_up=args.north_up, min_fans=args.min_fans,
                            model_ls_tolerance_deg=args.model_ls_tolerance, model_max_km=args.model_max_km,
                            seed=args.seed)
    run_winds(args.out, crowd=args.crowd, machine=args.machine, tiles=args.tiles, images=args.images,
              model_winds=args.model_winds, settings=settings, min_votes=args.min_votes, force=args.force)


def _demo(args):
    from training.demo import run_demo

    run_demo(args.out, tiles=args.tiles, model=args.model, retrain=args.retrain)


class _DefaultsFormatter(argparse.HelpFormatter):
    """Help that ends every option with its default (unless the text already says it)."""

    def _get_help_string(self, action):
        text = action.help or ""
        if action.required or action.default is argparse.SUPPRESS or "default" in text.lower():
            return text
        if not action.option_strings and action.nargs not in ("?", "*"):
            return text  # a required positional argument has no default
        default = "not set" if action.default is None else "%(default)s"
        return f"{text} (default: {default})"


class _Parser(argparse.ArgumentParser):
    """An argument parser whose help shows every option's default."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", _DefaultsFormatter)
        super().__init__(*args, **kwargs)


def _version():
    try:
        from importlib.metadata import version

        return version("frostvane")
    except Exception:  # run from a source tree without installing
        return "unknown"


def build_parser():
    parser = _Parser(
        prog="frostvane",
        description="Pre-screen orbital images for seasonal fans and spots, estimate remaining volunteer effort, "
        "and benchmark direction recovery.",
    )
    parser.add_argument("--version", action="version", version=f"frostvane {_version()}")
    commands = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    _add_detector_commands(commands)
    _add_training_commands(commands)
    return parser


class _Terminated(Exception):
    """SIGTERM as an exception, so that a run stops as on Ctrl-C: workers shut down, finished work kept."""


def _raise_terminated(signum, frame):
    raise _Terminated()


def _quiet_progress_off_terminal():
    """No progress bars when stderr is not a terminal (a log file or pipe would fill with them).

    Every bar is tqdm's; its ``TQDM_DISABLE`` environment setting is read when tqdm is first
    imported (after this, in this process) and is inherited by worker processes.
    """
    import os

    if not sys.stderr.isatty() and "tqdm" not in sys.modules:
        os.environ.setdefault("TQDM_DISABLE", "1")


def _runs_detector(args):
    """Whether the command runs the compiled pixel loops (features, candidates, readings)."""
    if args.command in ("screen", "train", "evaluate", "backtest", "labelling-order", "demo"):
        return True
    if args.command == "benchmark":
        return args.benchmark_command == "run"
    if args.command == "effort":
        return args.learning_curve is not None or args.next_tiles is not None
    return False


def main(argv=None):
    """Entry point of the ``frostvane`` console script; returns the exit code."""
    import signal
    import threading

    parser = build_parser()
    args = parser.parse_args(argv)
    _quiet_progress_off_terminal()
    # Without this, `kill` (SIGTERM) ends the process at once and its worker processes live on.
    on_main_thread = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGTERM, _raise_terminated) if on_main_thread else None
    try:
        if _runs_detector(args):
            # numba compiles on first use: without this line the first tile looks hung
            from detector._jit import announce_compiling

            announce_compiling()
        code = args.func(args)
    except DetectorError as err:
        problems = getattr(err, "problems", None) or [str(err)]
        for line in problems:
            print(f"frostvane: error: {line}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # The reader of our output went away (e.g. `| head`): stop quietly, as Unix tools do.
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except OSError as err:
        # The machine said no (read-only folder, full disk, ...): one line, as for bad input.
        where = f" {str(err.filename)!r}" if err.filename else ""
        print(f"frostvane: error: cannot read or write{where}: {err.strerror or err}.", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("frostvane: interrupted; finished work is kept and a rerun continues from it.", file=sys.stderr)
        return 130
    except _Terminated:
        print("frostvane: terminated; finished work is kept and a rerun continues from it.", file=sys.stderr)
        return 143  # 128 + SIGTERM, as a shell reports a process ended by it
    finally:
        if on_main_thread:
            signal.signal(signal.SIGTERM, previous)
    return 0 if code is None else int(code)


if __name__ == "__main__":
    sys.exit(main())
