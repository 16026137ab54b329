"""Surface winds by region and season from fan catalogs: ``frostvane winds``.

A fan runs downwind from its vent, so the direction a fan runs is the way the
wind blew *to*; the wind is named (meteorological convention) by where it came
*from*, the opposite way. Every table gives both.

What :func:`analyse_winds` computes, per catalog (crowd consensus and / or
machine detections), per region x solar-longitude bin and per image:

* the number of fans, their weighted circular mean direction (to and from),
  mean resultant length, circular standard deviation and a bootstrap 95 %
  interval of the mean;
* the Rayleigh test of uniformity (unweighted: the test counts fans);
* mean fan length in px and m, and the covered fraction with intervals;
* a choice between no preferred direction (uniform), one wind and two winds
  (one or two von Mises components fitted by EM), by BIC, with bootstrap
  intervals of every mode's direction, weight and concentration;
* machine versus crowd per bin and per image, and the match to a model's winds.

Weights
-------
``length_confidence`` (default) weights each fan by its length times its
confidence: a long fan records the wind over a longer stretch and its
direction is read more precisely (an end-to-end length against a few px of
apex error), and a fan the machine is unsure of (``score`` x
``direction_confidence``), or that fewer volunteers called a fan
(``fan_vote_share``), should count less. ``length``, ``confidence`` and
``none`` are the alternatives. The Rayleigh test and the mean fan length are
never weighted.

Resampling unit
---------------
Fans of one tile are not independent: several fans often share a vent and
all of a tile's fans saw the same local wind and terrain, and a volunteer
marks neighbouring fans alike. Resampling fans would treat them as independent
and make intervals too narrow, so the bootstrap resamples *tiles* (a cluster
bootstrap: a tile comes with all its fans), the independent unit here. A bin
with fewer than :data:`MIN_TILES_FOR_TILE_BOOTSTRAP` tiles with fans is
resampled by fans instead (too few clusters for a tile bootstrap to mean
anything) and says so in ``ci_unit``. The covered fraction always resamples
tiles. Interval of a mean direction: percentiles of the bootstrap means'
deviations from the sample mean (Fisher 1993, section 4.4.5).

References
----------
Fisher, N. I. (1993). Statistical Analysis of Circular Data. Cambridge University Press.
Zar, J. H. (2010). Biostatistical Analysis, 5th ed., chapter 26 (Rayleigh test).
"""

from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from detector import circstats
from detector.errors import CatalogError, DetectorError
from detector.geometry import angular_difference
from detector.io import atomic_dir, write_json

from ..evaluation.bootstrap import resample_counts
from .wind_catalogs import read_consensus_catalog, read_image_table, read_machine_catalog
from .wind_catalogs import metadata_from_tileset

__all__ = [
    "WEIGHTINGS",
    "RESAMPLE_UNITS",
    "FRAMES",
    "DEFAULT_LS_BIN_DEG",
    "WindSettings",
    "WindAnalysis",
    "signed_difference",
    "wind_from",
    "fan_weights",
    "BIN_KEYS",
    "IMAGE_KEYS",
    "summarise_groups",
    "compare_catalogs",
    "read_model_winds",
    "match_model_winds",
    "analyse_winds",
    "write_winds",
    "run_winds",
    "format_headline",
]

#: Fan weightings (see the module notes).
WEIGHTINGS = ("length_confidence", "length", "confidence", "none")
#: Bootstrap resampling units (see the module notes).
RESAMPLE_UNITS = ("tile", "fan")
#: Direction frames: azimuth from north where every fan has one, else image up; or forced.
FRAMES = ("auto", "azimuth", "image")
#: Solar-longitude bin width, degrees. Common practice in seasonal studies of the south polar
#: cap: 10 deg of Ls (about three weeks of southern spring) keeps a season's change visible
#: while a bin still gathers several images.
DEFAULT_LS_BIN_DEG = 10.0
#: Fewer tiles with fans than this in a bin and the bootstrap resamples fans.
MIN_TILES_FOR_TILE_BOOTSTRAP = 5
#: Fewest fans for a two-wind fit, and fewest fans of each catalog for a bin to be compared.
MIN_FANS_TWO_WINDS = 10
#: A second wind must carry at least this share of the weight; a smaller group is a few stray fans.
MIN_WIND_SHARE = 0.1
#: Two winds must point at least this far apart, degrees; closer components describe one wind
#: with heavy tails (a narrow core and a broad skirt), not two winds.
MIN_WIND_SEPARATION_DEG = 45.0
#: Difference of mean directions within which machine and crowd "agree" (a rule of thumb of
#: the trade for crowd against expert directions; common practice).
AGREE_DEG = 10.0

_FRAME_LABELS = {
    "azimuth": "azimuth, degrees clockwise from north",
    "image": "degrees clockwise from image up (not azimuths: the catalog is not georeferenced)",
    "image_north_up": "degrees clockwise from image up, taken as north (images stated north-up)",
}


@dataclass(frozen=True)
class WindSettings:
    """Every choice of a wind analysis; stored with its results.

    Attributes
    ----------
    ls_bin_deg : float
        Solar-longitude bin width, degrees; bins start at multiples of it.
    weighting : str
        One of :data:`WEIGHTINGS`.
    resample : str
        One of :data:`RESAMPLE_UNITS`.
    n_boot : int
        Bootstrap replicates of means, lengths and covered fractions.
    n_boot_modes : int
        Bootstrap replicates of the mixture fits (each refits EM).
    level : float
        Confidence level of every interval.
    frame : str
        One of :data:`FRAMES`.
    north_up : bool
        Image up is north (map-projected, north-up images): lets a catalog in
        image directions be matched to a model's azimuths.
    min_fans : int
        Fewest fans of each catalog for a bin or image to enter the machine-crowd comparison.
    agree_deg : float
        Agreement threshold of the comparison, degrees.
    model_ls_tolerance_deg : float or None
        Largest |Ls difference| between a bin's centre and a model row; default half a bin.
    model_max_km : float
        Largest distance from a bin's centroid to a model row given by lon/lat, km.
    seed : int
    """

    ls_bin_deg: float = DEFAULT_LS_BIN_DEG
    weighting: str = "length_confidence"
    resample: str = "tile"
    n_boot: int = 1000
    n_boot_modes: int = 200
    level: float = 0.95
    frame: str = "auto"
    north_up: bool = False
    min_fans: int = 5
    agree_deg: float = AGREE_DEG
    model_ls_tolerance_deg: float = None
    model_max_km: float = 100.0
    seed: int = 0

    def __post_init__(self):
        def need(ok, what):
            if not ok:
                raise DetectorError(what)

        need(0.0 < self.ls_bin_deg <= 360.0, f"ls_bin_deg must be in (0, 360]; got {self.ls_bin_deg!r}.")
        need(self.weighting in WEIGHTINGS, f"weighting {self.weighting!r} is not one of {list(WEIGHTINGS)}.")
        need(self.resample in RESAMPLE_UNITS, f"resample {self.resample!r} is not one of {list(RESAMPLE_UNITS)}.")
        need(self.frame in FRAMES, f"frame {self.frame!r} is not one of {list(FRAMES)}.")
        need(isinstance(self.n_boot, int) and self.n_boot >= 100, f"n_boot (--bootstrap) must be an integer >= 100; got {self.n_boot!r}.")
        need(isinstance(self.n_boot_modes, int) and self.n_boot_modes >= 20,
             f"n_boot_modes (--bootstrap-modes) must be an integer >= 20; got {self.n_boot_modes!r}.")
        need(0.5 <= self.level < 1.0, f"level must be in [0.5, 1); got {self.level!r}.")
        need(self.min_fans >= 2, f"min_fans must be at least 2; got {self.min_fans!r}.")
        need(0.0 < self.agree_deg <= 180.0, f"agree_deg must be in (0, 180]; got {self.agree_deg!r}.")
        tol = self.model_ls_tolerance_deg
        need(tol is None or 0.0 <= tol <= 180.0, f"model Ls tolerance must be in [0, 180]; got {tol!r}.")
        need(self.model_max_km > 0, f"model distance must be positive; got {self.model_max_km!r}.")

    @property
    def ls_tolerance(self):
        """Ls tolerance of the model match, degrees."""
        return self.ls_bin_deg / 2.0 if self.model_ls_tolerance_deg is None else self.model_ls_tolerance_deg


# ----------------------------------------------------------------------------- small helpers


def signed_difference(a_deg, b_deg):
    """Signed circular difference ``a - b`` in degrees, in [-180, 180)."""
    return (np.asarray(a_deg, dtype=float) - b_deg + 180.0) % 360.0 - 180.0


def wind_from(to_deg):
    """Where a wind came from, given the way it blew to (degrees, same frame)."""
    return (np.asarray(to_deg, dtype=float) + 180.0) % 360.0


def fan_weights(fans, weighting):
    """Weight of every fan in the means and mixture fits.

    Parameters
    ----------
    fans : DataFrame
        With ``length_px`` and ``confidence``.
    weighting : str
        One of :data:`WEIGHTINGS`.

    Returns
    -------
    weights : ndarray of shape (n,)
    """
    if weighting not in WEIGHTINGS:
        raise DetectorError(f"weighting {weighting!r} is not one of {list(WEIGHTINGS)}.")
    n = len(fans)
    length = fans["length_px"].to_numpy(dtype=float) if "length" in weighting else np.ones(n)
    confidence = fans["confidence"].to_numpy(dtype=float) if "confidence" in weighting else np.ones(n)
    return length * confidence


def _bin_start(ls, width):
    return np.floor(np.asarray(ls, dtype=float) / width + 1e-9) * width


def _centroid(lon, lat):
    """Mean position on the sphere (lon, lat in degrees); NaN without finite positions."""
    lon, lat = np.asarray(lon, dtype=float), np.asarray(lat, dtype=float)
    ok = np.isfinite(lon) & np.isfinite(lat)
    if not ok.any():
        return np.nan, np.nan
    lo, la = np.radians(lon[ok]), np.radians(lat[ok])
    v = np.array([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)]).mean(axis=1)
    return float(np.degrees(np.arctan2(v[1], v[0]))), float(np.degrees(np.arctan2(v[2], np.hypot(v[0], v[1]))))


def _quantiles(values, level):
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    if values.size < 2:
        return np.nan, np.nan
    a = (1.0 - level) / 2.0
    low, high = np.quantile(values, [a, 1.0 - a])
    return float(low), float(high)


def _direction_interval(centre, replicates, level):
    """Percentile interval of a direction from its bootstrap replicates (deviations from ``centre``)."""
    if not np.isfinite(centre):
        return np.nan, np.nan
    low, high = _quantiles(signed_difference(replicates, centre), level)
    if not np.isfinite(low):
        return np.nan, np.nan
    return float((centre + low) % 360.0), float((centre + high) % 360.0)


def _half_width(low, high, centre):
    """Largest distance of an interval's ends from its centre, degrees (NaN without an interval)."""
    if not (np.isfinite(low) and np.isfinite(high)):
        return np.nan
    return float(max(abs(signed_difference(low, centre)), abs(signed_difference(high, centre))))


# ----------------------------------------------------------------------------- one group




def _select_winds(angles, weights, settings, counts_by_fan, rng):
    """Uniform, one or two von Mises components by BIC, and the chosen modes with intervals."""
    n = angles.size
    result = {"bic_uniform": np.nan, "bic_one_wind": np.nan, "bic_two_winds": np.nan, "n_winds": np.nan}
    if n < 2 or weights.sum() <= 0:
        return result, []
    w = weights * (n / weights.sum())
    result["bic_uniform"] = -2.0 * circstats.loglik_uniform(n)
    fits = {1: circstats.fit_vonmises_mixture(angles, 1, w)}
    result["bic_one_wind"] = fits[1]["bic"]
    if n >= MIN_FANS_TWO_WINDS:
        fits[2] = circstats.fit_vonmises_mixture(angles, 2, w)
        result["bic_two_winds"] = fits[2]["bic"]
    candidates = {0: result["bic_uniform"], 1: fits[1]["bic"]}
    if 2 in fits and fits[2]["weight"].min() >= MIN_WIND_SHARE and \
            angular_difference(*fits[2]["mean_deg"]) >= MIN_WIND_SEPARATION_DEG:
        candidates[2] = fits[2]["bic"]
    chosen = min(candidates, key=candidates.get)
    result["n_winds"] = chosen
    if chosen == 0:
        return result, []
    fit = fits[chosen]
    rows = counts_by_fan[: settings.n_boot_modes] * w[None, :]
    mean_b, kappa_b, weight_b = circstats.refit_vonmises_mixture(angles, rows, fit)
    modes = []
    for j in range(chosen):
        low, high = _direction_interval(fit["mean_deg"][j], mean_b[:, j], settings.level)
        modes.append({
            "wind": j + 1, "to_deg": float(fit["mean_deg"][j]), "from_deg": float(wind_from(fit["mean_deg"][j])),
            "to_ci_low_deg": low, "to_ci_high_deg": high,
            "weight": float(fit["weight"][j]),
            "weight_ci_low": _quantiles(weight_b[:, j], settings.level)[0],
            "weight_ci_high": _quantiles(weight_b[:, j], settings.level)[1],
            "kappa": float(fit["kappa"][j]),
            "kappa_ci_low": _quantiles(kappa_b[:, j], settings.level)[0],
            "kappa_ci_high": _quantiles(kappa_b[:, j], settings.level)[1],
        })
    return result, modes


def _group_summary(fans, tiles, direction_column, settings, rng):
    """Every number of one group (a bin or an image): row dict, mode rows and bootstrap replicates."""
    angles = fans[direction_column].to_numpy(dtype=float)
    weights = fan_weights(fans, settings.weighting)
    n = angles.size
    row = {"n_images": int(tiles["image_id"].nunique()), "n_tiles": int(len(tiles)),
           "n_tiles_with_fans": int(fans["tile_key"].nunique()), "n_fans": int(n)}
    mean = circstats.circular_mean(angles, weights) if n else np.nan
    row.update({
        "mean_to_deg": mean, "mean_from_deg": float(wind_from(mean)) if np.isfinite(mean) else np.nan,
        "resultant_length": circstats.resultant_length(angles, weights) if n else np.nan,
        "circular_std_deg": circstats.circular_std(angles, weights) if n else np.nan,
    })
    z, p = circstats.rayleigh_test(angles) if n else (np.nan, np.nan)
    row.update({"rayleigh_z": z, "rayleigh_p": p})

    # Clusters for directions and lengths: tiles with fans (or fans, see the module notes).
    unit = settings.resample
    if unit == "tile" and row["n_tiles_with_fans"] < MIN_TILES_FOR_TILE_BOOTSTRAP:
        unit = "fan"
    if unit == "tile":
        keys, cluster = np.unique(fans["tile_key"].to_numpy(dtype=str), return_inverse=True)
        n_clusters = keys.size
    else:
        cluster, n_clusters = np.arange(n), n
    counts = resample_counts(rng, n_clusters, settings.n_boot)
    counts_by_fan = counts[:, cluster] if n else np.zeros((settings.n_boot, 0))
    rad = np.radians(angles)
    c_b = counts_by_fan @ (weights * np.cos(rad)) if n else np.full(settings.n_boot, np.nan)
    s_b = counts_by_fan @ (weights * np.sin(rad)) if n else np.full(settings.n_boot, np.nan)
    mean_b = np.degrees(np.arctan2(s_b, c_b)) % 360.0
    mean_b[~(np.hypot(c_b, s_b) > 1e-12)] = np.nan
    low, high = _direction_interval(mean, mean_b, settings.level) if n >= 2 else (np.nan, np.nan)
    row.update({"mean_ci_low_deg": low, "mean_ci_high_deg": high,
                "mean_ci_half_width_deg": _half_width(low, high, mean), "ci_unit": unit if n >= 2 else ""})

    length = fans["length_px"].to_numpy(dtype=float)
    length_m = fans["length_m"].to_numpy(dtype=float)
    known_m = np.isfinite(length_m)
    len_b = (counts_by_fan @ length) / np.maximum(counts_by_fan.sum(axis=1), 1e-300) if n else np.full(1, np.nan)
    row["length_px_mean"] = float(length.mean()) if n else np.nan
    row["length_px_ci_low"], row["length_px_ci_high"] = _quantiles(len_b, settings.level) if n >= 2 else (np.nan,) * 2
    if known_m.any():
        cm = counts_by_fan[:, known_m]
        lm_b = (cm @ length_m[known_m]) / np.maximum(cm.sum(axis=1), 1e-300)
        lm_b[cm.sum(axis=1) == 0] = np.nan
        row["length_m_mean"] = float(length_m[known_m].mean())
        row["length_m_ci_low"], row["length_m_ci_high"] = (_quantiles(lm_b, settings.level)
                                                           if known_m.sum() >= 2 else (np.nan, np.nan))
    else:
        row.update({"length_m_mean": np.nan, "length_m_ci_low": np.nan, "length_m_ci_high": np.nan})

    area = tiles["area_px"].to_numpy(dtype=float)
    covered = tiles["covered_px"].to_numpy(dtype=float)
    tile_counts = resample_counts(rng, len(tiles), settings.n_boot)
    cover_b = (tile_counts @ covered) / np.maximum(tile_counts @ area, 1e-300)
    row["covered_fraction"] = float(covered.sum() / area.sum()) if area.sum() > 0 else np.nan
    row["covered_ci_low"], row["covered_ci_high"] = _quantiles(cover_b, settings.level) if len(tiles) >= 2 else (np.nan,) * 2

    winds, modes = _select_winds(angles, weights, settings, counts_by_fan, rng)
    row.update(winds)
    lon, lat = _centroid(fans["lon_deg"], fans["lat_deg"])
    if not np.isfinite(lon):
        lon, lat = _centroid(tiles["lon_deg"], tiles["lat_deg"])
    row.update({"lon_deg": lon, "lat_deg": lat})
    return row, modes, {"mean": mean_b, "cover": cover_b}


BIN_KEYS = ("region", "ls_bin_start")
IMAGE_KEYS = ("image_id",)


def summarise_groups(catalog, keys, settings, *, direction_column):
    """Wind statistics of a catalog per group (region x Ls bin, or image).

    Parameters
    ----------
    catalog : FanCatalog
    keys : tuple of str
        :data:`BIN_KEYS` or :data:`IMAGE_KEYS`.
    settings : WindSettings
    direction_column : str
        ``"azimuth_deg"`` or ``"direction_deg"``.

    Returns
    -------
    rows : DataFrame
        One row per group: the keys, ``region``, ``ls_bin_start``, ``ls_bin_end``,
        ``solar_longitude_deg`` (mean Ls of its tiles) and every statistic.
    modes : DataFrame
        One row per wind of every group whose BIC chose one or two winds.
    replicates : dict
        Group key tuple -> bootstrap replicates (``mean``, ``cover``), for comparisons.
    """
    fans = catalog.fans.assign(ls_bin_start=_bin_start(catalog.fans["solar_longitude_deg"], settings.ls_bin_deg))
    tiles = catalog.tiles.assign(ls_bin_start=_bin_start(catalog.tiles["solar_longitude_deg"], settings.ls_bin_deg))
    keys = list(keys)
    def as_tuple(key):
        return key if isinstance(key, tuple) else (key,)

    fan_groups = {as_tuple(k): g for k, g in fans.groupby(keys, sort=True)} if len(fans) else {}
    rows, modes, replicates = [], [], {}
    tile_groups = list(tiles.groupby(keys, sort=True))
    seeds = np.random.SeedSequence([settings.seed, len(keys)]).spawn(len(tile_groups))
    for (key, group_tiles), seed in zip(tile_groups, seeds):
        key = as_tuple(key)
        group_fans = fan_groups.get(key, fans.iloc[0:0])
        row, group_modes, reps = _group_summary(group_fans, group_tiles, direction_column, settings,
                                                np.random.default_rng(seed))
        head = dict(zip(keys, key))
        head.setdefault("region", str(group_tiles["region"].iloc[0]))
        head.setdefault("ls_bin_start", float(group_tiles["ls_bin_start"].iloc[0]))
        head["ls_bin_end"] = head["ls_bin_start"] + settings.ls_bin_deg
        head["solar_longitude_deg"] = float(group_tiles["solar_longitude_deg"].mean())
        rows.append({"catalog": catalog.name, **head, **row})
        modes.extend({"catalog": catalog.name, **head, **m} for m in group_modes)
        replicates[tuple(key)] = reps
    return pd.DataFrame(rows), pd.DataFrame(modes), replicates


# ----------------------------------------------------------------------------- comparisons


def compare_catalogs(crowd_rows, machine_rows, crowd_reps, machine_reps, keys, settings):
    """Machine minus crowd per group present in both, with bootstrap intervals.

    The two catalogs are resampled independently (their tiles need not be the
    same: a screening cuts its own tiles), so the interval of a difference
    comes from differences of independent replicates.

    Returns
    -------
    table : DataFrame
        Keys, ``n_fans_crowd``, ``n_fans_machine``, both means, ``difference_deg``
        (machine - crowd, signed) with its interval, ``agree`` (|difference| <=
        ``agree_deg``), covered fractions and their difference with its
        interval; groups where either catalog has fewer than ``min_fans`` fans
        are left out.
    """
    keys = list(keys)
    if crowd_rows.empty or machine_rows.empty:
        return pd.DataFrame()
    merged = crowd_rows.merge(machine_rows, on=keys, suffixes=("_crowd", "_machine"))
    out = []
    for rec in merged.to_dict("records"):
        if min(rec["n_fans_crowd"], rec["n_fans_machine"]) < settings.min_fans:
            continue
        key = tuple(rec[k] for k in keys)
        diff = float(signed_difference(rec["mean_to_deg_machine"], rec["mean_to_deg_crowd"]))
        diff_b = signed_difference(machine_reps[key]["mean"], crowd_reps[key]["mean"])
        low, high = _quantiles(signed_difference(diff_b, diff), settings.level)
        cover_diff = rec["covered_fraction_machine"] - rec["covered_fraction_crowd"]
        cover_b = machine_reps[key]["cover"] - crowd_reps[key]["cover"]
        out.append({
            **{k: rec[k] for k in keys},
            "region": rec.get("region", rec.get("region_crowd")),
            "solar_longitude_deg": rec["solar_longitude_deg_crowd"],
            "n_fans_crowd": rec["n_fans_crowd"], "n_fans_machine": rec["n_fans_machine"],
            "mean_to_deg_crowd": rec["mean_to_deg_crowd"], "mean_to_deg_machine": rec["mean_to_deg_machine"],
            "difference_deg": diff, "difference_ci_low_deg": diff + low, "difference_ci_high_deg": diff + high,
            "agree": bool(abs(diff) <= settings.agree_deg),
            "covered_fraction_crowd": rec["covered_fraction_crowd"],
            "covered_fraction_machine": rec["covered_fraction_machine"],
            "covered_difference": cover_diff,
            "covered_difference_ci_low": _quantiles(cover_b, settings.level)[0],
            "covered_difference_ci_high": _quantiles(cover_b, settings.level)[1],
        })
    return pd.DataFrame(out)


MODEL_DIRECTION_COLUMNS = ("wind_to_deg", "wind_from_deg")


def read_model_winds(path):
    """A table of modelled near-surface winds (see README, "Winds by region and season").

    Columns: ``solar_longitude_deg`` (0-360); ``region`` or both ``lon_deg``
    and ``lat_deg``; exactly one of ``wind_to_deg`` (the way the wind blows
    to) and ``wind_from_deg`` (where it comes from, the meteorological
    convention), degrees clockwise from north in [0, 360); optional
    ``speed_m_s`` and ``height_m``.

    Returns
    -------
    model : DataFrame
        ``region`` (NaN when not given), ``lon_deg``, ``lat_deg``,
        ``solar_longitude_deg``, ``wind_to_deg``, ``wind_from_deg``, ``speed_m_s``, ``height_m``.
    """
    from .wind_catalogs import _check_range, _numbers, _read_csv

    frame = _read_csv(path, ("solar_longitude_deg",), "model wind table")
    if len(frame) == 0:
        raise CatalogError(f"{path} has no data rows.")
    given = [c for c in MODEL_DIRECTION_COLUMNS if c in frame.columns]
    if len(given) != 1:
        raise CatalogError(f"{path} must have exactly one of columns 'wind_to_deg' and 'wind_from_deg' "
                           f"(found: {', '.join(frame.columns)}).")
    has_region = "region" in frame.columns
    if not has_region and not {"lon_deg", "lat_deg"} <= set(frame.columns):
        raise CatalogError(f"{path} lacks column 'region' (or both 'lon_deg' and 'lat_deg') "
                           f"(found: {', '.join(frame.columns)}).")
    ls = _numbers(frame, path, "solar_longitude_deg", required=True)
    _check_range(path, ls, "solar_longitude_deg", (ls < 0) | (ls > 360), "is outside [0, 360]")
    direction = _numbers(frame, path, given[0], required=True)
    _check_range(path, direction, given[0], (direction < 0) | (direction >= 360), "is outside [0, 360)")
    lat = _numbers(frame, path, "lat_deg")
    _check_range(path, lat, "lat_deg", (lat < -90) | (lat > 90), "is outside [-90, 90]")
    to = direction if given[0] == "wind_to_deg" else wind_from(direction)
    return pd.DataFrame({
        "region": frame["region"] if has_region else np.nan,
        "lon_deg": _numbers(frame, path, "lon_deg"), "lat_deg": lat, "solar_longitude_deg": ls,
        "wind_to_deg": pd.Series(np.asarray(to, dtype=float), index=frame.index),
        "wind_from_deg": pd.Series(np.asarray(wind_from(to), dtype=float), index=frame.index),
        "speed_m_s": _numbers(frame, path, "speed_m_s"), "height_m": _numbers(frame, path, "height_m"),
    }).reset_index(drop=True)


def _distance_km(lon1, lat1, lon2, lat2):
    """Great-circle distance on the Mars sphere, km (haversine)."""
    from detector.gis.geo import MARS_RADIUS_M

    p1, p2 = np.radians(lat1), np.radians(lat2)
    dl = np.radians(np.asarray(lon2, dtype=float) - lon1)
    h = np.sin((p2 - p1) / 2) ** 2 + np.cos(p1) * np.cos(p2) * np.sin(dl / 2) ** 2
    return 2.0 * MARS_RADIUS_M / 1000.0 * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0)))


def match_model_winds(bins, modes, model, settings):
    """Match every bin to the model row of its region (or nearest lon/lat) nearest in Ls.

    A model row matches a bin when it names the bin's region (or lies within
    ``model_max_km`` of the bin's centroid, for rows given by lon/lat) and its
    Ls is within ``settings.ls_tolerance`` of the bin's centre; the nearest in
    Ls wins. Differences are observed minus model, signed, in degrees, of the
    "to" directions (the same as of the "from" directions).

    Returns
    -------
    table : DataFrame
        One row per matched bin with the model's values, the observed mean and
        its interval, ``difference_deg`` with its interval and, for two-wind
        bins, ``nearest_wind_difference_deg`` (to the nearer of the two winds).
    """
    out = []
    for rec in bins.to_dict("records"):
        if rec["n_fans"] < 2 or not np.isfinite(rec["mean_to_deg"]):
            continue
        centre = rec["ls_bin_start"] + settings.ls_bin_deg / 2.0
        by_region = model["region"].astype(str) == str(rec["region"])
        by_place = np.zeros(len(model), dtype=bool)
        if np.isfinite(rec["lon_deg"]):
            dist = _distance_km(rec["lon_deg"], rec["lat_deg"], model["lon_deg"], model["lat_deg"])
            by_place = np.asarray(np.nan_to_num(dist, nan=np.inf) <= settings.model_max_km)
        d_ls = angular_difference(model["solar_longitude_deg"].to_numpy(dtype=float), centre)
        ok = (by_region.to_numpy() | by_place) & (d_ls <= settings.ls_tolerance)
        if not ok.any():
            continue
        best = model.iloc[int(np.flatnonzero(ok)[np.argmin(d_ls[ok])])]
        diff = float(signed_difference(rec["mean_to_deg"], best["wind_to_deg"]))
        low = rec["mean_ci_low_deg"]
        high = rec["mean_ci_high_deg"]
        row = {
            "catalog": rec["catalog"], "region": rec["region"], "ls_bin_start": rec["ls_bin_start"],
            "ls_bin_end": rec["ls_bin_end"], "model_solar_longitude_deg": float(best["solar_longitude_deg"]),
            "model_wind_to_deg": float(best["wind_to_deg"]), "model_wind_from_deg": float(best["wind_from_deg"]),
            "model_speed_m_s": float(best["speed_m_s"]), "model_height_m": float(best["height_m"]),
            "n_fans": rec["n_fans"], "observed_to_deg": rec["mean_to_deg"], "observed_from_deg": rec["mean_from_deg"],
            "difference_deg": diff,
            "difference_ci_low_deg": float(signed_difference(low, best["wind_to_deg"])) if np.isfinite(low) else np.nan,
            "difference_ci_high_deg": float(signed_difference(high, best["wind_to_deg"])) if np.isfinite(high) else np.nan,
            "n_winds": rec["n_winds"], "nearest_wind_difference_deg": np.nan,
        }
        if rec["n_winds"] == 2 and not modes.empty:
            mine = modes[(modes["catalog"] == rec["catalog"]) & (modes["region"] == rec["region"])
                         & (modes["ls_bin_start"] == rec["ls_bin_start"])]
            d = signed_difference(mine["to_deg"].to_numpy(dtype=float), best["wind_to_deg"])
            row["nearest_wind_difference_deg"] = float(d[np.argmin(np.abs(d))])
        out.append(row)
    return pd.DataFrame(out)


# ----------------------------------------------------------------------------- the whole analysis


@dataclass
class WindAnalysis:
    """Everything :func:`analyse_winds` found; :func:`write_winds` writes it.

    Attributes
    ----------
    settings : WindSettings
    frame : str
        ``"azimuth"``, ``"image"`` or ``"image_north_up"``.
    catalogs : list of FanCatalog
    bins, images, bin_modes, image_modes : DataFrame
        :func:`summarise_groups` of every catalog, stacked (column ``catalog``).
    bin_agreement, image_agreement : DataFrame
        :func:`compare_catalogs` (empty without both catalogs).
    model_match : DataFrame
        :func:`match_model_winds` (empty without a model table).
    model_source : str or None
    """

    settings: WindSettings
    frame: str
    catalogs: list
    bins: pd.DataFrame
    images: pd.DataFrame
    bin_modes: pd.DataFrame
    image_modes: pd.DataFrame
    bin_agreement: pd.DataFrame = field(default_factory=pd.DataFrame)
    image_agreement: pd.DataFrame = field(default_factory=pd.DataFrame)
    model_match: pd.DataFrame = field(default_factory=pd.DataFrame)
    model_source: str = None

    @property
    def frame_label(self):
        """What the directions are measured from, in words."""
        return _FRAME_LABELS[self.frame]

    def agreement_share(self, which="bins"):
        """Share of compared bins (or images) whose means agree within ``agree_deg``; NaN when none."""
        table = self.bin_agreement if which == "bins" else self.image_agreement
        return float(table["agree"].mean()) if len(table) else np.nan


def _choose_frame(catalogs, settings):
    everywhere = all(c.georeferenced for c in catalogs)
    if settings.frame == "azimuth" and not everywhere:
        plain = next(c for c in catalogs if not c.georeferenced)
        raise CatalogError(f"{plain.source}: not every fan has an azimuth from north, so the azimuth frame "
                           f"cannot be used; use --frame image (directions from image up).")
    if settings.frame == "azimuth" or (settings.frame == "auto" and everywhere):
        return "azimuth", "azimuth_deg"
    return ("image_north_up" if settings.north_up else "image"), "direction_deg"


def analyse_winds(*, crowd=None, machine=(), tiles=None, images=None, model_winds=None, settings=None,
                  min_votes=3, log=print):
    """Read the catalogs and compute every table (nothing is written).

    Parameters
    ----------
    crowd : path-like, optional
        Tile-set folder whose ``consensus.csv`` is the crowd catalog; its
        ``tiles.csv`` also gives the machine catalog's regions and Ls.
    machine : sequence of path-like, optional
        Screening folders, or one evaluation's ``detections.csv`` (or its folder).
    tiles : path-like, optional
        Tile set giving regions, Ls and tile sizes of the machine catalog (default: ``crowd``).
    images : path-like, optional
        Image table (:func:`training.winds.wind_catalogs.read_image_table`).
    model_winds : path-like, optional
        Model wind table (:func:`read_model_winds`).
    settings : WindSettings, optional
    min_votes : int, default=3
        Votes a consensus feature needs (common practice: three volunteers).
    log : callable, default=print

    Returns
    -------
    WindAnalysis
    """
    settings = settings or WindSettings()
    machine = list(machine or ())
    if crowd is None and not machine:
        raise CatalogError("no catalog given: pass a tile set (--crowd) and / or machine detections (--machine).")
    catalogs = []
    meta = None
    if crowd is not None:
        catalogs.append(read_consensus_catalog(crowd, min_votes=min_votes))
    image_table = read_image_table(images) if images is not None else None
    if machine:
        meta_root = tiles if tiles is not None else crowd
        if meta_root is not None:
            _, meta = metadata_from_tileset(meta_root)
        catalogs.append(read_machine_catalog(machine, meta=meta, images=image_table))
    for c in catalogs:
        log(f"{c.name}: {len(c.fans)} fans on {len(c.tiles)} tiles of {c.tiles['image_id'].nunique()} image(s) "
            f"({c.kind}: {c.source})")
    frame, column = _choose_frame(catalogs, settings)
    model = read_model_winds(model_winds) if model_winds is not None else None
    if model is not None and frame == "image":
        raise CatalogError(f"{model_winds}: model winds are azimuths from north but the catalog's directions are "
                           f"from image up; pass --north-up if the images are map-projected north-up.")
    per_bin, per_image = {}, {}
    for c in catalogs:
        per_bin[c.name] = summarise_groups(c, BIN_KEYS, settings, direction_column=column)
        per_image[c.name] = summarise_groups(c, IMAGE_KEYS, settings, direction_column=column)

    def stack(parts, i):
        frames = [p[i] for p in parts.values() if not p[i].empty]
        return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()

    analysis = WindAnalysis(settings, frame, catalogs, stack(per_bin, 0), stack(per_image, 0),
                            stack(per_bin, 1), stack(per_image, 1))
    if "crowd" in per_bin and "machine" in per_bin:
        for which, parts, keys in (("bin_agreement", per_bin, BIN_KEYS), ("image_agreement", per_image, IMAGE_KEYS)):
            cr, mr = parts["crowd"], parts["machine"]
            setattr(analysis, which, compare_catalogs(cr[0], mr[0], cr[2], mr[2], keys, settings))
    if model is not None:
        analysis.model_match = match_model_winds(analysis.bins, analysis.bin_modes, model, settings)
        analysis.model_source = str(model_winds)
    return analysis


# ----------------------------------------------------------------------------- outputs


def _records(frame):
    """DataFrame rows as JSON-ready dicts (NaN -> None, numpy scalars -> Python)."""
    if frame is None or frame.empty:
        return []
    out = []
    for rec in frame.astype(object).to_dict("records"):
        clean = {}
        for k, v in rec.items():
            if isinstance(v, np.generic):
                v = v.item()
            if isinstance(v, float) and not np.isfinite(v):
                v = None
            clean[str(k)] = v
        out.append(clean)
    return out


def _bins_geojson(bins, frame_label):
    """Points at the bins' centroids (Mars lon/lat); bins without a location get a null geometry.

    RFC 7946: positions are [lon, lat] (planetocentric, on the IAU 2015 Mars sphere, :data:`GIS_CRS`),
    and the collection has no ``crs`` or other foreign member; each feature's properties say which
    frame its directions are in (``direction_frame``).
    """
    features = []
    for rec in _records(bins):
        located = rec.get("lon_deg") is not None and rec.get("lat_deg") is not None
        features.append({"type": "Feature",
                         "geometry": {"type": "Point", "coordinates": [rec["lon_deg"], rec["lat_deg"]]} if located else None,
                         "properties": {**rec, "direction_frame": frame_label}})
    return {"type": "FeatureCollection", "features": features}


#: Mars (2015) sphere, ocentric lon/lat: the CRS of the GIS layers (PROJ's IAU_2015 authority).
GIS_CRS = "IAU_2015:49900"


def _write_geopackage(path, bins):
    """The located bins as a point layer in a GeoPackage (GDAL through pyogrio); returns the count."""
    import struct

    import pyogrio.raw
    import pyproj

    located = bins[np.isfinite(bins["lon_deg"].to_numpy(dtype=float))] if len(bins) else bins
    if located.empty:
        return 0
    geometry = np.array([struct.pack("<BIdd", 1, 1, lon, lat)
                         for lon, lat in zip(located["lon_deg"], located["lat_deg"])], dtype=object)
    fields, data = [], []
    for column in located.columns:
        values = located[column]
        if pd.api.types.is_bool_dtype(values):
            values = values.to_numpy(dtype=np.int32)
        elif pd.api.types.is_numeric_dtype(values):
            values = values.to_numpy(dtype=float)
        else:
            values = values.astype(str).to_numpy(dtype=object)
        fields.append(column)
        data.append(values)
    pyogrio.raw.write(str(path), geometry, data, fields, layer="wind_bins", driver="GPKG", geometry_type="Point",
                      crs=pyproj.CRS(GIS_CRS).to_wkt())
    return int(len(located))


def write_winds(analysis, out, *, force=False):
    """Write every table, the JSON record, the GIS layers and the plots into ``out``.

    Files: ``bins.csv``, ``images.csv``, ``bin_modes.csv``, ``image_modes.csv``,
    ``agreement_bins.csv`` and ``agreement_images.csv`` (with both catalogs),
    ``model_match.csv`` (with a model table), ``winds.json`` (all of it plus the
    settings and the headline), ``bins.geojson``, ``bins.gpkg`` (located bins
    only) and the PNG plots of :mod:`training.winds.wind_plots`.

    Returns
    -------
    files : list of str
        Names written.
    """
    from . import wind_plots

    out = Path(out)
    if out.exists() and any(out.iterdir()) and not force:
        raise DetectorError(f"output folder {str(out)!r} is not empty; choose another or pass --force.")
    tables = {"bins.csv": analysis.bins, "images.csv": analysis.images, "bin_modes.csv": analysis.bin_modes,
              "image_modes.csv": analysis.image_modes}
    if not analysis.bin_agreement.empty or not analysis.image_agreement.empty:
        tables["agreement_bins.csv"] = analysis.bin_agreement
        tables["agreement_images.csv"] = analysis.image_agreement
    if analysis.model_source is not None:
        tables["model_match.csv"] = analysis.model_match
    with atomic_dir(out, replace=True) as tmp:
        for name, table in tables.items():
            table.to_csv(tmp / name, index=False, float_format="%.6g")
        from detector.gis.geojson import write_geojson

        write_geojson(tmp / "bins.geojson", _bins_geojson(analysis.bins, analysis.frame_label))
        n_gpkg = _write_geopackage(tmp / "bins.gpkg", analysis.bins)
        plots = wind_plots.plot_all(analysis, tmp)
        record = {
            "settings": asdict(analysis.settings),
            "directions": analysis.frame_label,
            "frame": analysis.frame,
            "convention": "to: the way the fans run (the wind blew toward it); from: where the wind came from "
                          "(to + 180). Differences are signed, degrees, in [-180, 180).",
            "catalogs": [{"name": c.name, "kind": c.kind, "source": c.source, "fans": int(len(c.fans)),
                          "tiles": int(len(c.tiles)), "images": int(c.tiles["image_id"].nunique())}
                         for c in analysis.catalogs],
            "bins": _records(analysis.bins), "images": _records(analysis.images),
            "bin_modes": _records(analysis.bin_modes), "image_modes": _records(analysis.image_modes),
            "agreement": {"agree_deg": analysis.settings.agree_deg,
                          "share_of_bins_agreeing": _none(analysis.agreement_share("bins")),
                          "share_of_images_agreeing": _none(analysis.agreement_share("images")),
                          "bins": _records(analysis.bin_agreement), "images": _records(analysis.image_agreement)},
            "model": {"source": analysis.model_source, "matches": _records(analysis.model_match)},
            "gis": {"geojson": "bins.geojson", "geopackage": "bins.gpkg" if n_gpkg else None,
                    "located_bins": n_gpkg, "crs": GIS_CRS},
            "plots": plots,
        }
        write_json(tmp / "winds.json", record, end="\n")
        if not n_gpkg:
            (tmp / "bins.gpkg").unlink(missing_ok=True)
        files = sorted(p.name for p in tmp.iterdir())
    return files


def _none(value):
    return None if value is None or not np.isfinite(value) else float(value)


def _fmt(value, spec=".0f", missing="-"):
    return format(value, spec) if value is not None and np.isfinite(value) else missing


def format_headline(analysis, *, max_rows=16):
    """The one-screen summary: per catalog and bin the winds, then the comparisons."""
    s = analysis.settings
    lines = [f"directions: {analysis.frame_label}; 'to' = the way the fans run, 'from' = where the wind came from",
             f"bins: region x Ls {s.ls_bin_deg:g} deg; weights: {s.weighting}; {int(s.level * 100)} % intervals by "
             f"bootstrap over {s.resample}s ({s.n_boot} replicates)"]
    header = f"{'catalog':<8} {'region':<14} {'Ls':>9} {'fans':>5} {'to':>5} {'from':>5} {'95% CI':>11} {'R':>5} " \
             f"{'p':>8} {'winds':>5}  modes (to, weight)"
    lines.append(header)
    bins = analysis.bins
    modes = analysis.bin_modes
    for rec in bins.head(max_rows).to_dict("records"):
        ci = f"{_fmt(rec['mean_ci_low_deg'])}-{_fmt(rec['mean_ci_high_deg'])}"
        mine = modes[(modes["catalog"] == rec["catalog"]) & (modes["region"] == rec["region"])
                     & (modes["ls_bin_start"] == rec["ls_bin_start"])] if not modes.empty else modes
        mode_text = ", ".join(f"{m['to_deg']:.0f} ({m['weight']:.2f})" for m in mine.to_dict("records"))
        winds = "-" if not np.isfinite(rec["n_winds"]) else ("calm" if rec["n_winds"] == 0 else f"{rec['n_winds']:.0f}")
        lines.append(f"{rec['catalog']:<8} {str(rec['region'])[:14]:<14} {rec['ls_bin_start']:4.0f}-{rec['ls_bin_end']:<4.0f} "
                     f"{rec['n_fans']:5d} {_fmt(rec['mean_to_deg']):>5} {_fmt(rec['mean_from_deg']):>5} {ci:>11} "
                     f"{_fmt(rec['resultant_length'], '.2f'):>5} {_fmt(rec['rayleigh_p'], '.1e'):>8} {winds:>5}  {mode_text}")
    if len(bins) > max_rows:
        lines.append(f"... and {len(bins) - max_rows} more bins: see bins.csv")
    for which, table in (("bins", analysis.bin_agreement), ("images", analysis.image_agreement)):
        if len(table):
            d = table["difference_deg"].abs()
            lines.append(f"machine vs crowd, {which}: {int(table['agree'].sum())} of {len(table)} agree within "
                         f"{s.agree_deg:g} deg ({100 * analysis.agreement_share(which):.0f} %; rule of thumb), "
                         f"median |difference| {d.median():.1f} deg")
    if analysis.model_source is not None:
        m = analysis.model_match
        if len(m):
            lines.append(f"model winds ({analysis.model_source}): {len(m)} bins matched, median |observed - model| "
                         f"{m['difference_deg'].abs().median():.1f} deg")
        else:
            lines.append(f"model winds ({analysis.model_source}): no bin matched within the tolerances")
    return "\n".join(lines)


def run_winds(out, *, crowd=None, machine=(), tiles=None, images=None, model_winds=None, settings=None,
              min_votes=3, force=False):
    """``frostvane winds``: analyse the catalogs, write the outputs, print the headline.

    Parameters
    ----------
    out : path-like
        Folder for the wind tables, GIS layers and plots.
    crowd, machine, tiles, images, model_winds, settings, min_votes
        As in :func:`analyse_winds`.
    force : bool, default=False
        Replace a non-empty output folder.
    """
    analysis = analyse_winds(crowd=crowd, machine=machine, tiles=tiles, images=images,
                             model_winds=model_winds, settings=settings, min_votes=min_votes)
    files = write_winds(analysis, out, force=force)
    print(format_headline(analysis))
    print(f"outputs in {out}: {', '.join(files)}")