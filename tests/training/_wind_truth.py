"""Invented catalogs with known per-image winds, for the wind tests and the recovery script.

:func:`synthesize_with_winds` renders a tile set with :func:`training.synth.synthesize_tileset`
and records, per image, the winds its generator drew. The generator does not write them
to any file, so the recorder wraps its deposit step, replays the two draws that open it
(first wind uniform in [0, 360), second wind 70-150 deg to either side) on a copy of the
scene's random state, and then lets the real step run unchanged. The caller checks the
record against ``truth.csv`` (see ``check_record``), so a change in the generator shows
up as a failed check rather than a wrong table.
"""

import numpy as np
import pandas as pd

from detector import circstats


def synthesize_with_winds(out, *, n_images, tiles_per_image, seed, tile_shape=(600, 800)):
    """Render a tile set; return a DataFrame of the generator's winds per image.

    Columns: ``image_id``, ``wind_mode`` ("one", "two", "calm"), ``first_to_deg``,
    ``second_to_deg`` (degrees clockwise from image up; the second only matters for "two").
    """
    from training import synth

    recorded = []
    original = synth._deposits

    def recording(vents, rng, params, wind_deg, settings):
        replay = np.random.Generator(type(rng.bit_generator)())
        replay.bit_generator.state = rng.bit_generator.state
        first = replay.uniform(0.0, 360.0) if wind_deg is None else wind_deg
        second = (first + replay.choice([-1, 1]) * replay.uniform(70, 150)) % 360.0
        recorded.append((params["wind"], float(first), float(second)))
        return original(vents, rng, params, wind_deg, settings)

    synth._deposits = recording
    try:
        synth.synthesize_tileset(out, n_images=n_images, tiles_per_image=tiles_per_image, seed=seed,
                                 tile_shape=tile_shape, force=True)
    finally:
        synth._deposits = original
    tiles = pd.read_csv(out / "tiles.csv")
    images = list(dict.fromkeys(tiles["image_id"]))
    return pd.DataFrame({"image_id": images, "wind_mode": [r[0] for r in recorded],
                         "first_to_deg": [r[1] for r in recorded], "second_to_deg": [r[2] for r in recorded]})


def check_record(out, winds):
    """Largest distance, degrees, between a one-wind image's recorded wind and its truth fans' robust mean."""
    truth = pd.read_csv(out / "truth.csv")
    tiles = pd.read_csv(out / "tiles.csv")
    truth = truth[truth["kind"] == "fan"].merge(tiles[["tile_id", "image_id"]], on="tile_id")
    worst = 0.0
    for rec in winds[winds["wind_mode"] == "one"].itertuples():
        d = truth.loc[truth["image_id"] == rec.image_id, "direction_deg"]
        worst = max(worst, float(circstats.angular_difference(circstats.robust_circular_mean(d), rec.first_to_deg)))
    return worst


def recovery_table(winds, images, modes):
    """Generator against recovered directions per image.

    Parameters
    ----------
    winds : DataFrame
        :func:`synthesize_with_winds`.
    images, modes : DataFrame
        Per-image rows and modes of a wind analysis (one catalog).

    Returns
    -------
    table : DataFrame
        ``image_id``, ``wind_mode``, ``generator_to_deg`` (one or two, text),
        ``n_fans``, ``n_winds``, ``recovered_to_deg`` (modes, text), ``mean_to_deg``,
        ``rayleigh_p``, ``error_deg`` (largest error over the generator's winds after
        pairing them with the recovered modes; NaN for calm).
    """
    rows = []
    for rec in winds.itertuples():
        img = images[images["image_id"] == rec.image_id].iloc[0]
        found = modes[modes["image_id"] == rec.image_id]["to_deg"].to_numpy(dtype=float) if len(modes) else np.array([])
        if rec.wind_mode == "one":
            truth = np.array([rec.first_to_deg])
        elif rec.wind_mode == "two":
            truth = np.array([rec.first_to_deg, rec.second_to_deg])
        else:
            truth = np.array([])
        error = np.nan
        if truth.size and found.size:
            error = max(float(np.min(circstats.angular_difference(found, t))) for t in truth)
        rows.append({"image_id": rec.image_id, "wind_mode": rec.wind_mode,
                     "generator_to_deg": " / ".join(f"{t:.1f}" for t in truth) or "none (calm)",
                     "n_fans": int(img["n_fans"]), "n_winds": img["n_winds"],
                     "recovered_to_deg": " / ".join(f"{f:.1f}" for f in found) or "none",
                     "mean_to_deg": img["mean_to_deg"], "rayleigh_p": img["rayleigh_p"], "error_deg": error})
    return pd.DataFrame(rows)
