"""``frostvane demo``: the whole job on the shipped demo tiles and model."""

import time
from pathlib import Path

from detector.errors import DetectorError
from detector.tileset import format_summary, load_tileset, summarize_tileset

__all__ = ["run_demo"]

#: Invented placement of the demo mosaic on the south polar grid (metres from the pole).
DEMO_ORIGIN_M = (-260_000.0, 310_000.0)


def _section(title):
    print(f"\n== {title} ==")


#: The benchmark results shipped beside a model (written by ``make models``).
BENCHMARK_FILE = "benchmark.json"


def _print_benchmark_headline(model_dir):
    """The model's benchmark table (held-out, shifted, negatives), when it ships one."""
    import json

    from .evaluation.benchmark import benchmark_table

    path = Path(model_dir) / BENCHMARK_FILE
    if not path.is_file():
        print(f"(no {BENCHMARK_FILE} beside the model: 'make benchmark' measures it)")
        return
    results = json.loads(path.read_text())
    print(f"benchmark of this model (frostvane benchmark run; {path}):")
    print(benchmark_table(results))


#: An invented table of modelled near-surface winds for the demo regions (wind_from_deg: where the
#: wind comes from, degrees clockwise from north), in the format ``frostvane winds --model-winds`` reads.
DEMO_MODEL_WINDS = """region,solar_longitude_deg,wind_from_deg,speed_m_s,height_m
Region Alpha,205,330,6.5,10
Region Alpha,235,300,5.0,10
Region Beta,185,60,7.0,10
Region Beta,225,240,4.5,10
Region Gamma,225,110,6.0,10
Region Delta,185,15,8.0,10
Region Delta,225,140,5.5,10
"""


def _demo_winds(tiles, screen_dir, out):
    """``frostvane winds`` on the demo consensus, the demo screening and an invented model table."""
    from detector.io import atomic_path

    from .winds.winds import WindSettings, analyse_winds, format_headline, write_winds

    model_csv = out / "model_winds.csv"
    with atomic_path(model_csv) as tmp:
        tmp.write_text(DEMO_MODEL_WINDS, encoding="utf-8")
    # The demo tiles are invented and taken as north-up, so that their image directions can
    # be set against the (equally invented) model azimuths.
    settings = WindSettings(north_up=True, n_boot=500, n_boot_modes=100)
    analysis = analyse_winds(crowd=tiles, machine=[screen_dir], model_winds=model_csv, settings=settings)
    write_winds(analysis, out / "winds", force=True)
    print(format_headline(analysis))
    print(f"wind tables, GIS layers and plots: {out / 'winds'} (roses_crowd.png, roses_machine.png, "
          f"direction_vs_ls.png, cover_length_vs_ls.png, machine_vs_crowd.png, model_match.png)")


#: Volunteer throughput of the demo's invented campaign, classifications a day.
DEMO_CLASSIFICATIONS_PER_DAY = 1500.0

#: Recorded studies shipped in docs/ (their commands are in README, "Where the next volunteer hour goes").
DOCS = Path(__file__).resolve().parent.parent / "docs"


def _next_hour(model_dir, tileset, unseen, out):
    """Rank the unseen demo tiles for volunteers; show the recorded labelling-order study and learning curve."""
    import json
    import shutil

    from .effort.active import rank_tiles, study_summary

    ids = tileset.tiles.loc[tileset.tiles["image_id"].isin(unseen), "tile_id"].tolist()
    ranked = rank_tiles(model_dir, tileset.root, ids)
    ranked.to_csv(out / "next_tiles.csv", index=False)
    print(ranked.head(5).to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    print(f"next tiles for volunteers: {out / 'next_tiles.csv'}")
    study = DOCS / "labelling_order.json"
    if study.is_file():
        print(f"recorded labelling-order study ({study}):")
        print(study_summary(json.loads(study.read_text())))
    for name in ("labelling_order.png", "learning_curve.png"):
        if (DOCS / name).is_file():
            shutil.copyfile(DOCS / name, out / name)


def run_demo(out, *, tiles, model, retrain=False):
    """Validate, evaluate, screen, estimate effort and read the winds on the demo tiles.

    Parameters
    ----------
    out : path-like
        Folder for everything the demo writes (replaced on every run).
    tiles : path-like
        The demo tile set.
    model : path-like
        The shipped model folder; trained afresh into ``out/model`` when missing or ``retrain``.
    retrain : bool, default=False
    """
    from affine import Affine

    from detector.gis.geo import MARS_SOUTH_POLAR_STEREO
    from detector.inference.model import load_model
    from detector.plots import plot_overlay
    from detector.gis.raster import mosaic_tiles

    from .evaluation.evaluate import evaluate_model

    started = time.perf_counter()
    out = Path(out)
    # Bad input (a broken tile set or model card) is refused before anything is written.
    tileset = load_tileset(tiles)
    if not retrain and (Path(model) / "model.json").is_file():
        load_model(model)
    out.mkdir(parents=True, exist_ok=True)

    _section("1. validate the demo tile set")
    print(format_summary(summarize_tileset(tileset)))
    with_fans = tileset.consensus.groupby("tile_id").size().sort_values(ascending=False).index[:4].tolist()
    overlay = plot_overlay(tileset, with_fans, out / "consensus_overlay.png")
    print(f"consensus overlay: {overlay}")

    model_dir = Path(model)
    if retrain or not (model_dir / "model.json").is_file():
        _section("2. train a model (no shipped model found or --retrain)")
        from .fitting.train import TrainConfig, format_card_summary, train_model

        model_dir = out / "model"
        card = train_model(tiles, model_dir, TrainConfig(seed=2026), force=True)
        print(format_card_summary(card, model_dir))
    else:
        _section(f"2. use the shipped model {model_dir}")
    card = load_model(model_dir).card
    seen = set(card["training"]["images"]["fit"]) | set(card["training"]["images"]["calibration"])
    unseen = [i for i in tileset.image_ids if i not in seen]
    if not unseen:
        raise DetectorError(f"every image of {str(tiles)!r} was used to fit or calibrate {str(model_dir)!r}; "
                            f"the demo needs unseen images to evaluate on.")
    print(f"images the model never saw in fitting or calibration: {', '.join(unseen)}")
    _print_benchmark_headline(model_dir)

    _section("3. evaluate on the unseen demo images")
    evaluate_model(model_dir, tiles, out / "report", images=unseen, force=True)
    print(f"report: {out / 'report' / 'report.md'} (plots beside it; where features are lost: "
          f"{out / 'report' / 'worst_tiles'})")

    _section("4. screen a whole demo image (a georeferenced GeoTIFF mosaic of its tiles)")
    from detector.screening.run import screen

    image_id = unseen[0]
    mpp = float(tileset.tiles.loc[tileset.tiles["image_id"] == image_id, "metres_per_px"].iloc[0])
    mpp = mpp if mpp == mpp else 0.5
    transform = Affine(mpp, 0.0, DEMO_ORIGIN_M[0], 0.0, -mpp, DEMO_ORIGIN_M[1])
    mosaic = out / f"{image_id}.tif"
    mosaic_tiles(tileset.tiles, tileset.root, image_id, mosaic, crs=MARS_SOUTH_POLAR_STEREO, transform=transform)
    screen_dir = out / "screen"
    if screen_dir.exists():
        import shutil

        shutil.rmtree(screen_dir)
    summary = screen(model_dir, [mosaic], screen_dir)
    print(summary.format())
    print(f"screening outputs: {screen_dir} (quicklook.png, rose.png, tiles.csv, detections.csv, detections.gpkg "
          f"in the mosaic's polar stereographic CRS, detections.geojson in planetocentric lon/lat)")

    _section("5. remaining volunteer effort")
    from .effort.campaign import Campaign
    from .effort.effort import run_effort

    # An invented campaign: 30 classifications a tile, 45 s each, 1500 a day from today.
    run_effort(model_dir, screen_dir, campaign=Campaign(seconds_per_classification=45.0,
                                                        classifications_per_day=DEMO_CLASSIFICATIONS_PER_DAY))

    _section("6. where the next volunteer hour goes")
    _next_hour(model_dir, tileset, unseen, out)

    _section("7. surface winds by region and season: the crowd's consensus and the screened image")
    _demo_winds(tiles, screen_dir, out)

    _section("done")
    print(f"everything is in {out}/: consensus_overlay.png, report/ (report.md, *.png), "
          f"screen/ (tiles.csv, detections.csv, detections.gpkg, detections.geojson, quicklook.png, rose.png, "
          f"effort.json, routes.csv, effort.png, hours.png), next_tiles.csv, labelling_order.png, learning_curve.png, "
          f"winds/ (bins.csv, images.csv, agreement_*.csv, model_match.csv, winds.json, bins.geojson, *.png)")
    print(f"demo took {time.perf_counter() - started:.0f} s")
