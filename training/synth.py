"""Invented synthetic orbital scenes of the seasonal CO2 ice cap, with truth and crowd consensus.

A scene is one single-band image of frost with multi-scale albedo texture and
gentle illumination gradients, on which lie terrain and deposits:

* polygonal patterned ground: a network of narrow dark troughs outlining
  polygons (the edges of a jittered Voronoi tessellation) over a smooth share
  of the image;
* araneiform terrain (thin dark branching channels radiating from centres),
  at many vents and also where nothing vented;
* other hard negatives that are *not* deposits: long dark troughs, dark rough
  patches and rim-shaded craters;
* the deposits: fans blown downwind from a vent, several of which often share
  a vent and point different ways, and roundish to mildly elliptical spots.
  Some vents sit on a polygon or long trough, so their fans start on it; some
  fan vents leave a spot under their fans; a share of fans is short and a
  share long, faint and broad.

The image is blurred, given its own contrast, made noisy and may carry no-data
(value 0) strips at its edges. The ranges all of this is drawn from are a
:class:`SceneSettings`; :data:`SCENE_PROFILES` holds the ``"nominal"`` preset
(the training distribution) and a ``"shifted"`` one whose deposit contrast,
image gain, blur and noise lie outside it.

:func:`synthesize_tileset` cuts such images into tiles and writes a tile set
(``tiles.csv``, ``consensus.csv``, ``truth.csv`` and 8-bit PNG tiles) in which
``truth.csv`` is the noise-free geometry of every rendered deposit and
``consensus.csv`` simulates what a crowd of volunteers would have reported:
jittered positions, directions and lengths, faint and small deposits missed
more often, wide fans sometimes reported as spots and a few weak false marks on
hard negatives (including points on the polygon and long troughs).

All names (image ids, regions) are invented. Pixel coordinates and directions
follow :mod:`detector.geometry`.
"""

import dataclasses
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import ndimage
from scipy.spatial import cKDTree
from scipy.special import expit, ndtri

from detector.contract import (
    CONSENSUS_COLUMNS,
    CONSENSUS_REQUIRED,
    CONSENSUS_FILE,
    TILES_OPTIONAL,
    TILES_REQUIRED,
    TILES_FILE,
    TRUTH_FILE,
)
from detector.errors import DetectorError
from detector.geometry import direction_deg, unit_vector
from detector.io import atomic_dir, write_image

__all__ = ["SCENARIOS", "SCENE_PROFILES", "SceneSettings", "render_scene", "synthesize_tileset", "to_uint8"]

#: Scene kinds: one prevailing wind, two winds, calm (mostly spots), faint late-season image.
SCENARIOS = ("windy", "two_winds", "calm", "faint")

# Order in which images of a tile set cycle through the scenarios.
_IMAGE_SCENARIOS = ("windy", "two_winds", "calm", "faint", "windy", "windy", "two_winds", "calm")
_REGIONS = ("Region Alpha", "Region Beta", "Region Gamma", "Region Delta")

_SCENARIO_PARAMS = {
    # vents per megapixel, share of vents that make a spot, wind mode, faint
    "windy": dict(density=34.0, p_spot=0.22, wind="one", faint=False),
    "two_winds": dict(density=34.0, p_spot=0.22, wind="two", faint=False),
    "calm": dict(density=30.0, p_spot=0.85, wind="calm", faint=False),
    "faint": dict(density=30.0, p_spot=0.3, wind="one", faint=True),
}

#: Share of images with one deposit-free tile, and the vent-free margin around it, px.
_QUIET_IMAGE_SHARE = 0.75
_QUIET_MARGIN_PX = 160

#: Standard deviation of fan directions about their wind, degrees (value chosen for the scenes).
WIND_SCATTER_DEG = 12.0

# The contract's geometry columns (kind .. semi_minor_px) plus what only the renderer knows.
_TRUTH_COLUMNS = CONSENSUS_REQUIRED[1:9] + ("contrast", "vent")


# ----------------------------------------------------------------------------- settings

_RANGE_FIELDS = {
    # field: (lowest allowed, highest allowed) for both ends of the range
    "polygon_cover": (0.0, 1.0),
    "polygon_cell_px": (8.0, 1000.0),
    "polygon_trough_px": (1.0, 12.0),
    "polygon_depth": (0.0, 0.9),
    "fan_contrast": (0.0, 0.95),
    "faint_contrast": (0.0, 0.95),
    "gain": (0.05, 3.0),
    "level": (0.0, 1.0),
    "faint_gain": (0.05, 3.0),
    "faint_level": (0.0, 1.0),
    "blur_sigma_px": (0.0, 10.0),
    "noise_dn": (0.0, 50.0),
    "short_fan_px": (10.0, 220.0),
    "broad_fan_contrast": (0.0, 0.95),
    "broad_fan_length_px": (10.0, 220.0),
    "broad_fan_opening_deg": (2.0, 120.0),
}
_SHARE_FIELDS = ("polygon_probability", "araneiform_share", "vent_on_trough_share", "spot_with_fans_share",
                 "short_fan_share", "broad_fan_share")
_RATE_FIELDS = ("araneiform_bare_per_mpx", "troughs_per_mpx", "rough_patches_per_mpx", "craters_per_mpx")


@dataclasses.dataclass(frozen=True)
class SceneSettings:
    """Ranges the scene renderer draws its terrain, deposits and image formation from.

    Every ``(low, high)`` pair is a closed range drawn uniformly once per image
    (or once per deposit for deposit properties); shares are probabilities and
    rates are expected counts per megapixel. Two presets live in
    :data:`SCENE_PROFILES`.

    Parameters
    ----------
    polygon_probability : float
        Share of images with polygonal patterned ground.
    polygon_cover : (float, float)
        Share of such an image the polygons cover (a smooth mask).
    polygon_cell_px : (float, float)
        Polygon spacing, px: the mean cell area is its square. Drawn
        log-uniformly per image.
    polygon_trough_px : (float, float)
        Width of the troughs outlining the polygons, px.
    polygon_depth : (float, float)
        Fractional darkening at a trough's centre.
    araneiform_share : float
        Share of vents at the centre of araneiform channels.
    araneiform_bare_per_mpx, troughs_per_mpx, rough_patches_per_mpx, craters_per_mpx : float
        Expected numbers per megapixel of araneiform networks without a vent,
        long troughs, dark rough patches and craters.
    vent_on_trough_share : float
        Share of vents moved onto the nearest polygon or long trough (within
        :data:`_SNAP_RADIUS_PX`), so that their fans start on it.
    spot_with_fans_share : float
        Share of fan-making vents that also leave a spot under their fans.
    fan_contrast, faint_contrast : (float, float)
        Fractional darkening at the source of fans and spots in ordinary and in
        faint late-season images.
    gain, level, faint_gain, faint_level : (float, float)
        Image contrast (gain about the frost level) and mean level, ordinary and
        faint images.
    blur_sigma_px : (float, float)
        Standard deviation of the Gaussian point spread, px.
    noise_dn : (float, float)
        Standard deviation of the additive noise, 8-bit grey levels.
    short_fan_share : float
        Share of fans that are short, with lengths in ``short_fan_px``.
    short_fan_px : (float, float)
        Lengths of short fans, px.
    broad_fan_share : float
        Share of fans that are long, faint and broad.
    broad_fan_contrast, broad_fan_length_px, broad_fan_opening_deg : (float, float)
        Source darkening, length (px) and full opening angle (degrees) of those.

    Raises
    ------
    DetectorError
        A range that is not an ordered pair inside its allowed bounds, or a
        share or rate outside its bounds; the message names the field.
    """

    polygon_probability: float = 0.5
    polygon_cover: tuple = (0.2, 0.6)
    polygon_cell_px: tuple = (30.0, 200.0)
    polygon_trough_px: tuple = (1.5, 4.0)
    polygon_depth: tuple = (0.15, 0.3)
    araneiform_share: float = 0.6
    araneiform_bare_per_mpx: float = 2.0
    troughs_per_mpx: float = 1.2
    rough_patches_per_mpx: float = 2.0
    craters_per_mpx: float = 1.5
    vent_on_trough_share: float = 0.25
    spot_with_fans_share: float = 0.2
    fan_contrast: tuple = (0.3, 0.65)
    faint_contrast: tuple = (0.15, 0.32)
    gain: tuple = (0.8, 1.15)
    level: tuple = (0.5, 0.62)
    faint_gain: tuple = (0.55, 0.7)
    faint_level: tuple = (0.62, 0.72)
    blur_sigma_px: tuple = (0.6, 1.2)
    noise_dn: tuple = (0.8, 2.0)
    short_fan_share: float = 0.12
    short_fan_px: tuple = (10.0, 20.0)
    broad_fan_share: float = 0.08
    broad_fan_contrast: tuple = (0.08, 0.2)
    broad_fan_length_px: tuple = (80.0, 220.0)
    broad_fan_opening_deg: tuple = (50.0, 90.0)

    def __post_init__(self):
        for name, (lowest, highest) in _RANGE_FIELDS.items():
            value = getattr(self, name)
            try:
                low, high = (float(v) for v in value)
            except (TypeError, ValueError) as err:
                raise DetectorError(f"SceneSettings.{name} {value!r} is not a (low, high) pair of numbers.") from err
            if not (lowest <= low <= high <= highest):
                raise DetectorError(
                    f"SceneSettings.{name} {value!r} must satisfy {lowest} <= low <= high <= {highest}."
                )
            object.__setattr__(self, name, (low, high))
        for name in _SHARE_FIELDS + _RATE_FIELDS:
            value = getattr(self, name)
            highest = 1.0 if name in _SHARE_FIELDS else 100.0
            if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) or not (
                0.0 <= value <= highest
            ):
                raise DetectorError(f"SceneSettings.{name} must be a number in [0, {highest}]; got {value!r}.")
            object.__setattr__(self, name, float(value))
        if self.short_fan_share + self.broad_fan_share > 1.0:
            raise DetectorError(
                f"SceneSettings.short_fan_share + broad_fan_share must be <= 1; got "
                f"{self.short_fan_share} + {self.broad_fan_share}."
            )


#: Named presets. ``"nominal"`` is the training distribution; ``"shifted"`` lies
#: outside it in deposit contrast, image gain, blur and noise (each range disjoint
#: from the nominal one) and has more polygonal ground and rough terrain, so a
#: benchmark on it measures robustness rather than memory.
SCENE_PROFILES = {
    "nominal": SceneSettings(),
    "shifted": SceneSettings(
        polygon_probability=0.95,
        polygon_cover=(0.6, 0.95),
        polygon_depth=(0.2, 0.35),
        troughs_per_mpx=2.0,
        rough_patches_per_mpx=3.0,
        vent_on_trough_share=0.35,
        fan_contrast=(0.18, 0.28),
        faint_contrast=(0.09, 0.14),
        gain=(0.6, 0.78),
        faint_gain=(0.42, 0.53),
        blur_sigma_px=(1.4, 2.0),
        noise_dn=(2.5, 4.0),
        short_fan_share=0.18,
        broad_fan_share=0.12,
        broad_fan_contrast=(0.05, 0.075),
    ),
}

#: Farthest a vent is moved to reach a trough, px.
_SNAP_RADIUS_PX = 60.0


def _resolve_settings(settings):
    """``None`` -> nominal; a profile name -> its preset; a :class:`SceneSettings` as is."""
    if settings is None:
        return SCENE_PROFILES["nominal"]
    if isinstance(settings, SceneSettings):
        return settings
    if isinstance(settings, str) and settings in SCENE_PROFILES:
        return SCENE_PROFILES[settings]
    raise DetectorError(
        f"settings {settings!r} is neither a SceneSettings nor a profile name ({', '.join(SCENE_PROFILES)})."
    )


# ----------------------------------------------------------------------------- rendering


def render_scene(shape, rng, *, scenario="windy", wind_deg=None, density=1.0, nodata=None, settings=None):
    """Render one invented orbital image of seasonal frost with fans and spots.

    Parameters
    ----------
    shape : tuple of int
        Image shape (rows, cols), px; any size (a benchmark may ask for a large one).
    rng : numpy.random.Generator
        Source of all randomness; the same generator state gives the same scene.
    scenario : {"windy", "two_winds", "calm", "faint"}, optional
        ``"windy"``: one prevailing wind with scatter; ``"two_winds"``: vents
        blew under two winds; ``"calm"``: mostly spots, few fans in random
        directions; ``"faint"``: late season, low-contrast deposits.
    wind_deg : float, optional
        Prevailing wind direction the fans run to, degrees clockwise from image
        up; random when omitted.
    density : float, optional
        Multiplier of the number of vents.
    nodata : bool, optional
        Whether to cut no-data strips at the image edges; random when omitted.
    settings : SceneSettings or str, optional
        Ranges to draw terrain, deposits and image formation from, or the name
        of a preset in :data:`SCENE_PROFILES`; ``None`` means ``"nominal"``.

    Returns
    -------
    image : ndarray of shape (rows, cols), float32
        Reflectance-like values; no-data pixels are exactly 0, valid pixels lie
        in [1/255, 1] so that :func:`to_uint8` keeps them >= 1.
    truth : pandas.DataFrame
        One row per rendered deposit in image pixel coordinates: ``kind``,
        ``x_px``, ``y_px`` (fan apex or spot centre), ``direction_deg``
        (fan: source to far end; spot: long axis mod 180), ``length_px``,
        ``opening_deg`` (fans), ``semi_major_px``, ``semi_minor_px`` (spots),
        ``contrast`` (apparent fractional darkening at the source) and ``vent``
        (fans from the same vent share this number).
    """
    image, truth, _, _ = _render_scene(
        shape, rng, scenario=scenario, wind_deg=wind_deg, density=density, nodata=nodata, settings=settings
    )
    return image, truth


def to_uint8(image):
    """Quantise a scene from :func:`render_scene` to 8 bits (0 stays no-data).

    Parameters
    ----------
    image : ndarray of shape (M, N), float in [0, 1]

    Returns
    -------
    ndarray of shape (M, N), uint8
    """
    return np.round(np.clip(image, 0.0, 1.0) * 255.0).astype(np.uint8)


def _render_scene(shape, rng, *, scenario, wind_deg, density, nodata, settings=None, quiet_rows=None):
    """Render a scene; also return hard-negative positions (K, 2) as (x, y) px and a dict of layers.

    ``quiet_rows`` (start, stop), optional: a band of rows where no vent lies, so
    that a tile there holds terrain and hard negatives but no deposit. The
    layers are ``troughs`` (bool, polygon and long-trough pixels), ``channels``
    (bool, araneiform pixels) and the drawn ``blur_sigma_px``, ``noise_dn``,
    ``gain`` and ``level``.
    """
    settings = _resolve_settings(settings)
    if scenario not in _SCENARIO_PARAMS:
        raise DetectorError(f"scenario {scenario!r} is unknown; expected one of {', '.join(SCENARIOS)}.")
    try:
        rows, cols = (int(v) for v in shape)
    except (TypeError, ValueError) as err:
        raise DetectorError(f"scene shape {shape!r} is not a pair of integers (rows, cols).") from err
    if rows < 32 or cols < 32:
        raise DetectorError(f"scene shape {shape!r} is too small; both sides must be >= 32 px.")
    params = _SCENARIO_PARAMS[scenario]
    faint = params["faint"]
    shape = (rows, cols)
    area_mpx = rows * cols / 1e6

    valid = _nodata_mask(shape, rng, enabled=rng.random() < 0.45 if nodata is None else bool(nodata))
    sun_deg = rng.uniform(0.0, 360.0)
    sun = np.array(unit_vector(sun_deg))

    frost, streaks = _frost(shape, rng)
    relief = np.zeros(shape)

    # Terrain that vents may sit on: polygonal patterned ground and long troughs.
    polygons, polygon_troughs = _polygon_ground(shape, rng, settings)
    troughs = _long_troughs(shape, rng, n=rng.poisson(settings.troughs_per_mpx * area_mpx) + rng.integers(0, 2))
    on_trough = (polygon_troughs | (troughs > 0.5)) & valid

    # Vents cluster in active ground; a smooth field leaves bare stretches between.
    vents = _vents(shape, rng, valid, density=params["density"] * density, area_mpx=area_mpx)
    vents = _snap_to_troughs(vents, rng, on_trough, share=settings.vent_on_trough_share)
    if quiet_rows is not None:
        vents = vents[(vents[:, 1] < quiet_rows[0]) | (vents[:, 1] >= quiet_rows[1])]
    truth = _deposits(vents, rng, params, wind_deg, settings)

    # Araneiform channels at many vents, plus networks that vented nothing.
    spider_at = vents[rng.random(len(vents)) < settings.araneiform_share]
    n_bare = rng.poisson(0.35 * len(vents) + settings.araneiform_bare_per_mpx * area_mpx)
    bare = np.column_stack([rng.uniform(0, cols - 1, n_bare), rng.uniform(0, rows - 1, n_bare)])
    centres = np.vstack([spider_at, bare])
    spider = _araneiform(shape, rng, centres)
    relief -= spider + troughs + 0.8 * polygons
    frost *= 1.0 - 0.24 * spider - 0.2 * troughs - polygons

    patches = _rough_patches(shape, rng, frost, n=rng.poisson(settings.rough_patches_per_mpx * area_mpx) + 1)
    craters = _craters(shape, rng, relief, n=rng.poisson(settings.craters_per_mpx * area_mpx))
    # Shading of relief by the sun: slopes facing it brighter, the others darker.
    grad_r, grad_c = np.gradient(relief)
    frost -= 0.06 * (grad_c * sun[0] + grad_r * sun[1])

    tau = np.zeros(shape)
    _draw_deposits(tau, truth, streaks)
    dark = rng.uniform(0.14, 0.22)
    cover = -np.expm1(-tau)
    scene = frost * (1.0 - cover) + dark * cover

    scene, camera = _camera(scene, rng, settings, faint=faint)
    scene[~valid] = 0.0

    truth["contrast"] = truth["contrast"] * camera["gain"]
    # A few points on polygon and long troughs, where volunteers may put a weak mark.
    trough_idx = np.flatnonzero(on_trough)
    n_marks = min(rng.poisson(2.0 * trough_idx.size / 2e4), trough_idx.size)
    picked = np.sort(rng.choice(trough_idx, n_marks, replace=False)) if n_marks else np.zeros(0, int)
    on_troughs = np.column_stack([picked % cols, picked // cols]).astype(float)
    negatives = np.vstack([np.zeros((0, 2)), bare, patches, craters, on_troughs])
    layers = dict(troughs=on_trough, channels=spider > 0.5, **camera)
    return scene.astype(np.float32), truth, negatives, layers


def _camera(scene, rng, settings, *, faint):
    """Image formation: Gaussian point spread, gain and level, additive noise, clipped to [1/255, 1].

    Returns the image and the drawn ``blur_sigma_px``, ``noise_dn``, ``gain`` and ``level``.
    """
    sigma = rng.uniform(*settings.blur_sigma_px)
    scene = ndimage.gaussian_filter(scene, sigma)
    if faint:
        gain, level = rng.uniform(*settings.faint_gain), rng.uniform(*settings.faint_level)
    else:
        gain, level = rng.uniform(*settings.gain), rng.uniform(*settings.level)
    scene = level + gain * (scene - 0.62)
    noise = rng.uniform(*settings.noise_dn)
    scene += rng.normal(0.0, noise / 255.0, scene.shape)
    scene = np.clip(scene, 1.0 / 255.0, 1.0)
    return scene, dict(blur_sigma_px=float(sigma), noise_dn=float(noise), gain=float(gain), level=float(level))


def _polygon_seeds(shape, rng, cell_px):
    """Seeds (K, 2) as (x, y) px of a jittered square grid of spacing ``cell_px``, inside the image."""
    rows, cols = shape
    gy, gx = np.mgrid[0 : int(np.ceil(rows / cell_px)), 0 : int(np.ceil(cols / cell_px))]
    jitter = rng.uniform(-0.4, 0.4, (2,) + gx.shape)
    x = ((gx + 0.5 + jitter[0]) * cell_px).ravel()
    y = ((gy + 0.5 + jitter[1]) * cell_px).ravel()
    inside = (x <= cols - 1) & (y <= rows - 1)
    return np.column_stack([x[inside], y[inside]])


def _polygon_troughs(shape, seeds, *, width_px, within=None):
    """Troughs along the edges of the Voronoi cells of ``seeds``: coverage in [0, 1] per pixel.

    Pixels take the label of their nearest seed (a Euclidean distance transform
    of the seed raster); only pixels near a label change get their exact
    distance ``t`` to the bisector of their two nearest seeds, and the coverage
    ``clip(width / 2 + 1 / 2 - t, 0, 1)`` integrates to ``width_px`` across a
    trough.

    Parameters
    ----------
    shape : tuple of int
    seeds : ndarray of shape (K, 2)
        (x, y) px; rounded to pixel centres.
    width_px : float
        Trough width, px.
    within : ndarray of bool, optional
        Only these pixels may be covered.
    """
    rows, cols = shape
    out = np.zeros(shape)
    cells = np.unique(np.round(seeds[:, 1]).astype(int).clip(0, rows - 1) * cols
                      + np.round(seeds[:, 0]).astype(int).clip(0, cols - 1))
    if cells.size < 2:
        return out
    seed_rc = np.column_stack([cells // cols, cells % cols])
    marker = np.ones(shape, dtype=bool)
    marker[seed_rc[:, 0], seed_rc[:, 1]] = False
    ir, ic = ndimage.distance_transform_edt(marker, return_distances=False, return_indices=True)
    label = (ir * cols + ic).astype(np.int64)
    edge = np.zeros(shape, dtype=bool)
    step = label[:, 1:] != label[:, :-1]
    edge[:, 1:] |= step
    edge[:, :-1] |= step
    step = label[1:, :] != label[:-1, :]
    edge[1:, :] |= step
    edge[:-1, :] |= step
    near = ndimage.binary_dilation(edge, np.ones((3, 3), bool), iterations=int(np.ceil(width_px / 2.0 + 1.0)))
    if within is not None:
        near &= within
    pr, pc = np.nonzero(near)
    if pr.size == 0:
        return out
    seed_xy = seed_rc[:, ::-1].astype(float)
    d, idx = cKDTree(seed_xy).query(np.column_stack([pc, pr]).astype(float), k=2)
    gap = np.hypot(*(seed_xy[idx[:, 1]] - seed_xy[idx[:, 0]]).T)
    t = (d[:, 1] ** 2 - d[:, 0] ** 2) / (2.0 * np.maximum(gap, 1e-9))
    out[pr, pc] = np.clip(width_px / 2.0 + 0.5 - t, 0.0, 1.0)
    return out


def _polygon_ground(shape, rng, settings):
    """Polygonal patterned ground over a smooth share of the image (or none, at the settings' odds).

    Returns the fractional darkening (0 .. about the drawn depth) and the trough
    pixels (bool: at least half covered by a trough, inside the cover).
    """
    if rng.random() >= settings.polygon_probability:
        return np.zeros(shape), np.zeros(shape, dtype=bool)
    cover = rng.uniform(*settings.polygon_cover)
    spacing = np.exp(rng.uniform(*np.log(settings.polygon_cell_px)))
    width = rng.uniform(*settings.polygon_trough_px)
    depth = rng.uniform(*settings.polygon_depth)
    # A smooth unit-variance field above its (1 - cover) quantile covers about that share.
    field = _smooth_noise(shape, rng, 250.0)
    mask = expit((field - ndtri(1.0 - np.clip(cover, 0.01, 0.99))) / 0.15)
    seeds = _polygon_seeds(shape, rng, spacing)
    trough = _polygon_troughs(shape, seeds, width_px=width, within=mask > 0.02)
    # Trough floors vary a little in darkness along the network.
    floor = 1.0 + 0.15 * _smooth_noise(shape, rng, 40.0)
    return np.clip(depth * trough * mask * floor, 0.0, 0.9), (trough >= 0.5) & (mask > 0.5)


def _snap_to_troughs(vents, rng, on_trough, *, share):
    """Move a share of the vents onto the nearest trough pixel within :data:`_SNAP_RADIUS_PX`."""
    if len(vents) == 0 or share <= 0.0 or not on_trough.any():
        return vents
    move = rng.random(len(vents)) < share
    offset = rng.uniform(-0.45, 0.45, (len(vents), 2))
    dist, (ir, ic) = ndimage.distance_transform_edt(~on_trough, return_indices=True)
    r = np.round(vents[:, 1]).astype(int)
    c = np.round(vents[:, 0]).astype(int)
    move &= dist[r, c] <= _SNAP_RADIUS_PX
    snapped = np.column_stack([ic[r, c], ir[r, c]]) + offset
    snapped = np.clip(snapped, 0.0, [on_trough.shape[1] - 1.0, on_trough.shape[0] - 1.0])
    return np.where(move[:, None], snapped, vents)


def _smooth_noise(shape, rng, scale):
    """Zero-mean, unit-variance noise field of correlation length ~``scale`` px.

    White noise on a coarse grid of node spacing ``scale`` is interpolated with
    separable Gaussian weights, i.e. two small matrix products instead of a
    full-resolution filter.
    """

    def weights(n):
        nodes = np.arange(-2, int(np.ceil(n / scale)) + 3) * scale
        w = np.exp(-0.5 * ((np.arange(n)[:, None] - nodes[None, :]) / (0.7 * scale)) ** 2)
        return w

    w_rows, w_cols = weights(shape[0]), weights(shape[1])
    field = w_rows @ rng.standard_normal((w_rows.shape[1], w_cols.shape[1])) @ w_cols.T
    return (field - field.mean()) / (field.std() + 1e-12)


def _frost(shape, rng):
    """Frost albedo with multi-scale texture and an illumination gradient; also a streak field in [0, 1]."""
    rows, cols = shape
    frost = 0.64 + 0.045 * _smooth_noise(shape, rng, 400.0)
    frost += 0.03 * _smooth_noise(shape, rng, 120.0)
    mid = _smooth_noise(shape, rng, 30.0)
    frost += 0.018 * mid
    fine = ndimage.gaussian_filter(rng.standard_normal(shape), 1.2)
    frost += 0.012 * fine / (fine.std() + 1e-12)
    # Gentle illumination gradient over the whole image.
    r = np.linspace(-0.5, 0.5, rows)[:, None]
    c = np.linspace(-0.5, 0.5, cols)[None, :]
    slope = rng.normal(0.0, 0.04, 2)
    frost += slope[0] * r + slope[1] * c
    streaks = expit(1.5 * _smooth_noise(shape, rng, 6.0))
    return frost, streaks


def _nodata_mask(shape, rng, *, enabled):
    """Valid-data mask; slanted no-data strips at the left/right (sometimes top) edge."""
    rows, cols = shape
    valid = np.ones(shape, dtype=bool)
    if not enabled:
        return valid
    r = np.arange(rows)[:, None]
    c = np.arange(cols)[None, :]
    side = rng.integers(0, 3)  # 0 left, 1 right, 2 both
    for which in (0, 1):
        if side in (which, 2):
            width = rng.uniform(0.02, 0.12) * cols
            edge = width + rng.uniform(-0.03, 0.03) * (r - rows / 2)
            valid &= (c >= edge) if which == 0 else (c <= cols - 1 - edge)
    if rng.random() < 0.25:
        valid &= r >= rng.uniform(0.01, 0.05) * rows
    return valid


def _vents(shape, rng, valid, *, density, area_mpx):
    """Vent positions (K, 2) as (x, y) px: clustered, inside valid data, sparse in bare ground."""
    rows, cols = shape
    n_target = rng.poisson(density * area_mpx)
    n_clusters = 1 + rng.poisson(3.0 * area_mpx)
    centres = np.column_stack([rng.uniform(0, cols - 1, n_clusters), rng.uniform(0, rows - 1, n_clusters)])
    sizes = rng.uniform(60.0, 220.0, n_clusters)
    # Over-draw, then thin: clustered points, plus background points kept only in active ground.
    n_draw = 3 * n_target + 10
    which = rng.integers(0, n_clusters, n_draw)
    clustered = centres[which] + rng.normal(size=(n_draw, 2)) * sizes[which, None]
    background = np.column_stack([rng.uniform(0, cols - 1, n_draw), rng.uniform(0, rows - 1, n_draw)])
    activity = _smooth_noise(shape, rng, 500.0)
    pick_bg = rng.random(n_draw) < 0.3
    points = np.where(pick_bg[:, None], background, clustered)
    inside = (points[:, 0] >= 2) & (points[:, 0] <= cols - 3) & (points[:, 1] >= 2) & (points[:, 1] <= rows - 3)
    points = points[inside]
    ri, ci = np.round(points[:, 1]).astype(int), np.round(points[:, 0]).astype(int)
    keep = valid[ri, ci] & (rng.random(len(points)) < expit((activity[ri, ci] + 0.3) / 0.35))
    return points[keep][:n_target]


def _deposits(vents, rng, params, wind_deg, settings):
    """Truth table of fans and spots emitted by the vents (image px).

    Spot vents leave one spot; the others one to three fans, and a share of
    those a spot under them too (same apex and vent number). A share of fans is
    short and a share long, faint and broad (``settings``).
    """
    n = len(vents)
    if wind_deg is None:
        wind_deg = rng.uniform(0.0, 360.0)
    winds = np.array([wind_deg, (wind_deg + rng.choice([-1, 1]) * rng.uniform(70, 150)) % 360.0])
    is_spot = rng.random(n) < params["p_spot"]
    n_fans = np.where(is_spot, 0, rng.choice([1, 2, 3], size=n, p=[0.62, 0.26, 0.12]))
    vent_of_fan = np.repeat(np.arange(n), n_fans)
    rank = np.concatenate([np.arange(k) for k in n_fans]) if n else np.zeros(0, int)
    m = len(vent_of_fan)
    if params["wind"] == "calm":
        base = rng.uniform(0, 360, n)[vent_of_fan]
        shift = rng.choice([-1, 1], m) * rng.uniform(40, 140, m)
        lengths = np.exp(rng.normal(np.log(28.0), 0.5, m))
    else:
        if params["wind"] == "two":
            first = rng.integers(0, 2, n)
            # The second wind of a vent is the other one: the wind shifted while it vented.
            base = winds[(first[vent_of_fan] + rank) % 2]
            shift = np.where(rank >= 2, rng.choice([-1, 1], m) * rng.uniform(30, 80, m), 0.0)
        else:
            base = np.full(m, winds[0])
            shift = rng.choice([-1, 1], m) * rng.uniform(30, 90, m)
        lengths = np.exp(rng.normal(np.log(48.0), 0.55, m))
    direction = (base + np.where(rank > 0, shift, 0.0) + rng.normal(0, WIND_SCATTER_DEG, m)) % 360.0
    lengths = np.clip(lengths, 10.0, 220.0)
    spread = rng.triangular(10.0, 28.0, 70.0, m)
    faint = params["faint"]
    contrast_range = settings.faint_contrast if faint else settings.fan_contrast
    fan_contrast = rng.uniform(*contrast_range, m)
    # Short fans, and long faint broad ones, at their shares.
    u = rng.random(m)
    short = u < settings.short_fan_share
    broad = ~short & (u < settings.short_fan_share + settings.broad_fan_share)
    lengths = np.where(short, rng.uniform(*settings.short_fan_px, m), lengths)
    lengths = np.where(broad, rng.uniform(*settings.broad_fan_length_px, m), lengths)
    spread = np.where(broad, rng.uniform(*settings.broad_fan_opening_deg, m), spread)
    fan_contrast = np.where(broad, rng.uniform(*settings.broad_fan_contrast, m), fan_contrast)
    fans = pd.DataFrame(
        {
            "kind": "fan",
            "x_px": vents[vent_of_fan, 0],
            "y_px": vents[vent_of_fan, 1],
            "direction_deg": direction,
            "length_px": lengths,
            "opening_deg": spread,
            "semi_major_px": np.nan,
            "semi_minor_px": np.nan,
            "contrast": fan_contrast,
            "vent": vent_of_fan,
        }
    )
    # Some fan vents first left a spot, which the fans then grew out of.
    under_fans = ~is_spot & (rng.random(n) < settings.spot_with_fans_share)
    spot_vents = np.flatnonzero(is_spot | under_fans)
    k = len(spot_vents)
    small = rng.random(k) < 0.7
    major = np.where(small, np.clip(np.exp(rng.normal(np.log(8.0), 0.35, k)), 5.0, 15.0), rng.uniform(15.0, 40.0, k))
    spots = pd.DataFrame(
        {
            "kind": "spot",
            "x_px": vents[spot_vents, 0],
            "y_px": vents[spot_vents, 1],
            "direction_deg": rng.uniform(0.0, 180.0, k),
            "length_px": np.nan,
            "opening_deg": np.nan,
            "semi_major_px": major,
            "semi_minor_px": major * rng.uniform(0.6, 0.98, k),
            "contrast": rng.uniform(*contrast_range, k),
            "vent": spot_vents,
        }
    )
    truth = pd.concat([fans, spots], ignore_index=True) if k else fans
    return truth.loc[:, list(_TRUTH_COLUMNS)].reset_index(drop=True)


def _bbox(shape, x, y, radius):
    """Row and column slices of the box of half-size ``radius`` px around (x, y), clipped."""
    r0, r1 = max(int(np.floor(y - radius)), 0), min(int(np.ceil(y + radius)) + 1, shape[0])
    c0, c1 = max(int(np.floor(x - radius)), 0), min(int(np.ceil(x + radius)) + 1, shape[1])
    return slice(r0, r1), slice(c0, c1)


def _draw_deposits(tau, truth, streaks):
    """Add each deposit's optical depth to ``tau`` inside its bounding box."""
    shape = tau.shape
    cols = truth.to_dict("list")
    for i, kind in enumerate(cols["kind"]):
        x0, y0, theta, c0 = cols["x_px"][i], cols["y_px"][i], cols["direction_deg"][i], cols["contrast"][i]
        if kind == "fan":
            length, half = cols["length_px"][i], np.radians(cols["opening_deg"][i] / 2.0)
            rs, cs = _bbox(shape, x0, y0, length / np.cos(half) + 6.0)
        else:
            major, minor = cols["semi_major_px"][i], cols["semi_minor_px"][i]
            rs, cs = _bbox(shape, x0, y0, 1.4 * major + 4.0)
        yy, xx = np.mgrid[rs, cs]
        dx, dy = xx - x0, yy - y0
        uc, ur = unit_vector(theta)
        along = dx * uc + dy * ur
        across = -dx * ur + dy * uc
        if kind == "fan":
            # Ragged edges: the streak field modulates the local half-width.
            width = (2.5 + np.maximum(along, 0.0) * np.tan(half)) * (0.8 + 0.4 * streaks[rs, cs])
            lateral = expit((width - np.abs(across)) / (0.7 + 0.12 * width))
            longitudinal = expit((along + 2.0) / 0.8) * expit((length - along) / (0.6 + 0.07 * length))
            # Darkest at the source, fading towards the far end.
            fade = np.exp(-1.6 * np.clip(along, 0.0, None) / length)
            cover = c0 * lateral * longitudinal * fade
        else:
            radius = np.hypot(along / major, across / minor)
            cover = c0 * expit((1.0 - radius) / 0.12) * (1.0 - 0.35 * np.clip(radius, 0.0, 1.0))
        cover = cover * (0.75 + 0.5 * streaks[rs, cs])
        tau[rs, cs] -= np.log1p(-np.clip(cover, 0.0, 0.95))


def _polylines(rng, starts, headings, lengths, *, step, wiggle_deg):
    """Random-walk polylines from ``starts`` (K, 2); returns points (K, S+1, 2) and a validity mask."""
    k = len(starts)
    n_steps = max(int(np.ceil(lengths.max() / step)) if k else 1, 1)
    turn = rng.normal(0.0, wiggle_deg, (k, n_steps))
    heading = headings[:, None] + np.cumsum(turn, axis=1)
    d_col, d_row = unit_vector(heading)
    steps = np.stack([d_col, d_row], axis=-1) * step
    points = np.concatenate([starts[:, None, :], starts[:, None, :] + np.cumsum(steps, axis=1)], axis=1)
    live = np.arange(n_steps + 1)[None, :] * step <= lengths[:, None]
    return points, live, heading


def _rasterise(shape, points, live, weights, *, sigma):
    """Blurred, peak-normalised raster of polylines; ``weights`` (K, S+1) per vertex."""
    mask = np.zeros(shape)
    if points.shape[0] == 0:
        return mask
    sub = 8
    t = (np.arange(sub) / sub)[None, None, :, None]
    seg = points[:, :-1, None, :] + t * (points[:, 1:, None, :] - points[:, :-1, None, :])
    seg_w = np.repeat(weights[:, :-1, None], sub, axis=2)
    seg_live = np.repeat((live[:, :-1] & live[:, 1:])[:, :, None], sub, axis=2)
    seg, seg_w = seg[seg_live], seg_w[seg_live]
    c, r = np.round(seg[:, 0]).astype(int), np.round(seg[:, 1]).astype(int)
    ok = (r >= 0) & (r < shape[0]) & (c >= 0) & (c < shape[1])
    np.maximum.at(mask, (r[ok], c[ok]), seg_w[ok])
    # A blurred one-pixel line peaks at 1/(sqrt(2 pi) sigma) of its weight.
    return ndimage.gaussian_filter(mask, sigma) * np.sqrt(2.0 * np.pi) * sigma


def _araneiform(shape, rng, centres):
    """Darkening (0..~1) of thin branching troughs radiating from ``centres`` (K, 2)."""
    if len(centres) == 0:
        return np.zeros(shape)
    n_arms = rng.integers(5, 12, len(centres))
    owner = np.repeat(np.arange(len(centres)), n_arms)
    size = rng.uniform(25.0, 80.0, len(centres))[owner]
    starts = centres[owner]
    headings = rng.uniform(0.0, 360.0, len(owner))
    lengths = size * rng.uniform(0.5, 1.0, len(owner))
    points, live, heading = _polylines(rng, starts, headings, lengths, step=4.0, wiggle_deg=12.0)
    weights = np.clip(1.0 - 0.7 * np.arange(points.shape[1])[None, :] * 4.0 / lengths[:, None], 0.3, 1.0)
    # One level of side branches from random live vertices.
    n_branch = rng.poisson(1.5 * len(owner))
    arm = rng.integers(0, len(owner), n_branch)
    vertex = (rng.random(n_branch) * (lengths[arm] / 4.0)).astype(int) + 1
    vertex = np.minimum(vertex, points.shape[1] - 2)
    b_starts = points[arm, vertex]
    b_head = heading[arm, vertex - 1] + rng.choice([-1, 1], n_branch) * rng.uniform(25.0, 55.0, n_branch)
    b_len = (lengths[arm] - vertex * 4.0).clip(6.0) * rng.uniform(0.3, 0.7, n_branch)
    b_points, b_live, _ = _polylines(rng, b_starts, b_head, b_len, step=4.0, wiggle_deg=12.0)
    b_weights = np.broadcast_to(0.6 * weights[arm, vertex][:, None], b_live.shape)
    main = _rasterise(shape, points, live, weights, sigma=0.7)
    side = _rasterise(shape, b_points, b_live, np.ascontiguousarray(b_weights), sigma=0.6)
    return np.clip(np.maximum(main, side), 0.0, 1.0)


def _long_troughs(shape, rng, *, n):
    """Darkening of long, gently curving linear troughs (hard negatives)."""
    rows, cols = shape
    if n == 0:
        return np.zeros(shape)
    starts = np.column_stack([rng.uniform(0, cols - 1, n), rng.uniform(0, rows - 1, n)])
    lengths = rng.uniform(200.0, 900.0, n)
    points, live, _ = _polylines(rng, starts, rng.uniform(0, 360, n), lengths, step=8.0, wiggle_deg=2.5)
    weights = np.full(live.shape, 1.0) * rng.uniform(0.6, 1.0, n)[:, None]
    return np.clip(_rasterise(shape, points, live, weights, sigma=rng.uniform(1.2, 2.0)), 0.0, 1.0)


def _rough_patches(shape, rng, frost, *, n):
    """Darken rough, knobbly terrain patches in place (hard negatives); return centres (K, 2)."""
    rows, cols = shape
    centres = np.column_stack([rng.uniform(0, cols - 1, n), rng.uniform(0, rows - 1, n)])
    for x0, y0 in centres:
        radius = rng.uniform(30.0, 110.0)
        aspect, angle = rng.uniform(0.5, 1.0), rng.uniform(0.0, 180.0)
        rs, cs = _bbox(shape, x0, y0, 1.4 * radius)
        yy, xx = np.mgrid[rs, cs]
        uc, ur = unit_vector(angle)
        along = (xx - x0) * uc + (yy - y0) * ur
        across = -(xx - x0) * ur + (yy - y0) * uc
        ell = np.hypot(along / radius, across / (aspect * radius))
        box = (rs.stop - rs.start, cs.stop - cs.start)
        lumpy = ndimage.gaussian_filter(rng.standard_normal(box), 6.0)
        lumpy /= lumpy.std() + 1e-12
        mask = expit((1.0 - ell + 0.25 * lumpy) / 0.08)
        knobs = ndimage.gaussian_filter(rng.standard_normal(box), 1.5)
        knobs /= knobs.std() + 1e-12
        frost[rs, cs] -= mask * (rng.uniform(0.06, 0.14) + 0.03 * np.abs(knobs))
    return centres


def _craters(shape, rng, relief, *, n):
    """Add crater bowls with raised rims to the relief field in place; return centres (K, 2)."""
    rows, cols = shape
    centres = np.column_stack([rng.uniform(0, cols - 1, n), rng.uniform(0, rows - 1, n)])
    for x0, y0 in centres:
        radius = rng.uniform(8.0, 40.0)
        rs, cs = _bbox(shape, x0, y0, 1.6 * radius + 3.0)
        yy, xx = np.mgrid[rs, cs]
        r = np.hypot(xx - x0, yy - y0) / radius
        bowl = -np.clip(1.0 - r**2, 0.0, None)
        rim = 0.35 * np.exp(-(((r - 1.0) / 0.18) ** 2))
        relief[rs, cs] += 0.9 * radius * (bowl + rim)
    return centres


# ----------------------------------------------------------------------------- crowd simulation


def _tile_truth(truth, tile_shape, n_tiles):
    """Assign features to tiles of a vertical strip by apex/centre; tile pixel coordinates."""
    height, width = tile_shape
    tile = np.floor((truth["y_px"].to_numpy() + 0.5) / height).astype(int)
    inside = (tile >= 0) & (tile < n_tiles)
    out = truth.loc[inside].copy()
    out["tile"] = tile[inside]
    # Apexes within half a pixel of a border snap onto the border pixel centre.
    out["x_px"] = out["x_px"].clip(0.0, width - 1.0)
    out["y_px"] = (out["y_px"] - out["tile"] * height).clip(0.0, height - 1.0)
    return out.reset_index(drop=True)


def _ray_to_border(x, y, d_col, d_row, tile_shape):
    """Distance from (x, y) along (d_col, d_row) to the last pixel centre of the tile, px."""
    height, width = tile_shape
    with np.errstate(divide="ignore", invalid="ignore"):
        tx = np.where(d_col > 1e-9, (width - 1 - x) / d_col, np.where(d_col < -1e-9, -x / d_col, np.inf))
        ty = np.where(d_row > 1e-9, (height - 1 - y) / d_row, np.where(d_row < -1e-9, -y / d_row, np.inf))
    return np.maximum(np.minimum(tx, ty), 0.0)


def _crowd(truth, negatives, classifications, tile_shape, rng):
    """Simulated crowd consensus of one image's tiles from their truth (tile coordinates).

    Parameters
    ----------
    truth : DataFrame
        Output of :func:`_tile_truth` (with ``tile`` and ``contrast`` columns).
    negatives : DataFrame
        Hard-negative positions in tile coordinates with a ``tile`` column.
    classifications : ndarray of int
        Volunteers per tile.
    """
    height, width = tile_shape
    is_fan = (truth["kind"] == "fan").to_numpy()
    x, y = truth["x_px"].to_numpy(), truth["y_px"].to_numpy()
    theta = truth["direction_deg"].to_numpy()
    length = truth["length_px"].to_numpy()
    spread = truth["opening_deg"].to_numpy()
    major, minor = truth["semi_major_px"].to_numpy(), truth["semi_minor_px"].to_numpy()
    n_cls = classifications[truth["tile"].to_numpy()]
    m = len(truth)

    # Visibility: faint and small deposits are found by fewer volunteers.
    half = np.radians(np.nan_to_num(spread) / 2.0)
    size = np.where(
        is_fan,
        np.sqrt(np.nan_to_num(length) * (1.5 + 0.5 * np.nan_to_num(length) * np.tan(half))),
        np.sqrt(np.nan_to_num(major) * np.nan_to_num(minor)),
    )
    visibility = truth["contrast"].to_numpy() / 0.35 * (1.0 - np.exp(-size / 8.0))
    p_mark = 0.92 * expit((visibility - 0.6) / 0.15)
    # Of several fans from one vent, the lesser ones are easily overlooked beside the longest.
    longest = truth.groupby(["tile", "vent"])["length_px"].transform("max").to_numpy()
    p_mark = np.where(is_fan & (np.nan_to_num(length) < longest), 0.75 * p_mark, p_mark)
    votes = rng.binomial(n_cls, p_mark)
    # Wide or short fans look like spots to some volunteers; elongated spots like fans.
    q_fan = np.where(
        is_fan,
        np.clip(0.97 - 0.02 * np.maximum(np.nan_to_num(spread) - 45.0, 0.0) - 0.3 * np.exp(-np.nan_to_num(length) / 10.0), 0.3, 0.97),
        0.03 + 0.25 * (1.0 - np.nan_to_num(minor) / np.where(is_fan, 1.0, np.nan_to_num(major, nan=1.0))),
    )
    fan_votes = rng.binomial(votes, q_fan)
    with np.errstate(invalid="ignore", divide="ignore"):
        fan_vote_share = fan_votes / votes
    as_fan = fan_vote_share >= 0.5
    safe_votes = np.maximum(votes, 1)

    sd_pos = 0.8 + 4.0 / np.sqrt(safe_votes)
    jitter = rng.normal(size=(m, 6))
    d_col, d_row = unit_vector(theta)
    # Fans: the visible part ends at the tile border; volunteers mark apex and far end.
    vis_len = np.where(is_fan, np.minimum(np.nan_to_num(length), _ray_to_border(x, y, d_col, d_row, tile_shape)), 0.0)
    # Spots reported as fans run along their long axis, from one end.
    flip = rng.random(m) < 0.5
    spot_dir = np.where(flip, theta + 180.0, theta) % 360.0
    s_col, s_row = unit_vector(spot_dir)
    apex_x = np.where(is_fan, x, x - s_col * 0.8 * np.nan_to_num(major))
    apex_y = np.where(is_fan, y, y - s_row * 0.8 * np.nan_to_num(major))
    fan_len = np.where(is_fan, vis_len, 1.6 * np.nan_to_num(major))
    fan_col, fan_row = np.where(is_fan, d_col, s_col), np.where(is_fan, d_row, s_row)
    ax = np.clip(apex_x + sd_pos * jitter[:, 0], 0.0, width - 1.0)
    ay = np.clip(apex_y + sd_pos * jitter[:, 1], 0.0, height - 1.0)
    sd_far = sd_pos + 0.04 * fan_len
    fx = np.clip(apex_x + fan_col * fan_len + sd_far * jitter[:, 2], 0.0, width - 1.0)
    fy = np.clip(apex_y + fan_row * fan_len + sd_far * jitter[:, 3], 0.0, height - 1.0)
    rep_len = np.maximum(np.hypot(fx - ax, fy - ay), 1.0)
    rep_dir = np.where(np.hypot(fx - ax, fy - ay) > 1e-6, direction_deg(fx - ax, fy - ay), np.where(is_fan, theta, spot_dir))
    truth_spread = np.where(is_fan, np.nan_to_num(spread), np.degrees(2.0 * np.arctan2(np.nan_to_num(minor), np.nan_to_num(major, nan=1.0))))
    rep_spread = np.clip(truth_spread * np.exp((0.12 + 0.3 / np.sqrt(safe_votes)) * jitter[:, 4]), 2.0, 180.0)

    # Spots, or fans reported as spots (a blob centred part-way down the fan).
    cx = np.where(is_fan, x + d_col * 0.45 * vis_len, x)
    cy = np.where(is_fan, y + d_row * 0.45 * vis_len, y)
    cx = np.clip(cx + sd_pos * rng.normal(size=m), 0.0, width - 1.0)
    cy = np.clip(cy + sd_pos * rng.normal(size=m), 0.0, height - 1.0)
    t_major = np.where(is_fan, np.maximum(0.5 * vis_len, 2.0), np.nan_to_num(major))
    t_minor = np.where(is_fan, np.minimum(t_major, 0.5 * vis_len * np.tan(half) + 1.0), np.nan_to_num(minor))
    sd_axes = 0.08 + 0.25 / np.sqrt(safe_votes)
    a = t_major * np.exp(sd_axes * rng.normal(size=m))
    b = t_minor * np.exp(sd_axes * rng.normal(size=m))
    swap = b > a
    a, b = np.where(swap, b, a), np.where(swap, a, b)
    roundness = 1.0 - t_minor / np.maximum(t_major, 1e-9)
    axis = theta + np.minimum(90.0, 4.0 / np.maximum(roundness, 0.05)) * rng.normal(size=m)
    axis = (axis + np.where(swap, 90.0, 0.0)) % 180.0

    keep = votes >= 1
    rows = pd.DataFrame(
        {
            "tile": truth["tile"].to_numpy(),
            "kind": np.where(as_fan, "fan", "spot"),
            "x_px": np.where(as_fan, ax, cx),
            "y_px": np.where(as_fan, ay, cy),
            "direction_deg": np.where(as_fan, rep_dir % 360.0, axis),
            "length_px": np.where(as_fan, rep_len, np.nan),
            "opening_deg": np.where(as_fan, rep_spread, np.nan),
            "semi_major_px": np.where(as_fan, np.nan, np.maximum(a, 1.0)),
            "semi_minor_px": np.where(as_fan, np.nan, np.maximum(b, 0.5)),
            "votes": votes,
            "fan_vote_share": np.nan_to_num(fan_vote_share),
        }
    ).loc[keep]
    return pd.concat([rows, _false_marks(negatives, classifications, tile_shape, rng)], ignore_index=True)


def _false_marks(negatives, classifications, tile_shape, rng):
    """A few weak marks (mostly 1-2 votes) that volunteers put on hard negatives."""
    height, width = tile_shape
    pick = rng.random(len(negatives)) < 0.25
    neg = negatives.loc[pick].reset_index(drop=True)
    k = len(neg)
    votes = np.minimum(rng.choice([1, 1, 1, 2, 2, 3], size=k), classifications[neg["tile"].to_numpy()])
    as_fan = rng.random(k) < 0.3
    fan_votes = np.where(as_fan, votes, 0)
    size = rng.uniform(5.0, 25.0, k)
    x = np.clip(neg["x_px"].to_numpy() + rng.normal(0, 3, k), 0.0, width - 1.0)
    y = np.clip(neg["y_px"].to_numpy() + rng.normal(0, 3, k), 0.0, height - 1.0)
    # A mark's far end stays inside the tile: point inwards at a border, stop at it.
    heading = rng.uniform(0, 360, k)
    room = _ray_to_border(x, y, *unit_vector(heading), tile_shape)
    heading = np.where(room < 3.0, (heading + 180.0) % 360.0, heading)
    room = _ray_to_border(x, y, *unit_vector(heading), tile_shape)
    return pd.DataFrame(
        {
            "tile": neg["tile"].to_numpy(),
            "kind": np.where(as_fan, "fan", "spot"),
            "x_px": x,
            "y_px": y,
            "direction_deg": np.where(as_fan, heading, heading % 180.0),
            "length_px": np.where(as_fan, np.maximum(np.minimum(2.0 * size, room), 1.0), np.nan),
            "opening_deg": np.where(as_fan, rng.uniform(15.0, 45.0, k), np.nan),
            "semi_major_px": np.where(as_fan, np.nan, size),
            "semi_minor_px": np.where(as_fan, np.nan, size * rng.uniform(0.6, 1.0, k)),
            "votes": votes.astype(int),
            "fan_vote_share": fan_votes / np.maximum(votes, 1),
        }
    )


# ----------------------------------------------------------------------------- tile sets


def _image_layout(index, rng, prefix="SYN"):
    """Scenario, id and acquisition metadata of the ``index``-th (0-based) image."""
    scenario = _IMAGE_SCENARIOS[index % len(_IMAGE_SCENARIOS)]
    region = int(rng.integers(0, len(_REGIONS)))
    faint = _SCENARIO_PARAMS[scenario]["faint"]
    meta = {
        "scenario": scenario,
        "image_id": f"{prefix}_{index + 1:04d}_{'ABCD'[region]}",
        "region": _REGIONS[region],
        "solar_longitude_deg": round(float(rng.uniform(232.0, 250.0) if faint else rng.uniform(180.0, 232.0)), 1),
        "metres_per_px": round(float(rng.uniform(0.25, 0.5)), 3),
    }
    # About half the images have one stretch of bare frost: a tile with terrain, hard
    # negatives and no deposit, where false detections can be counted.
    meta["quiet_fraction"] = float(rng.uniform()) if rng.random() < _QUIET_IMAGE_SHARE else None
    return meta


def _synthesize_image(index, seed_seq, tiles_per_image, tile_shape, settings=None, prefix="SYN"):
    """Render one image and cut it into tiles.

    Returns
    -------
    tiles : list of (tile_id, uint8 ndarray)
    tiles_table, truth_table, consensus_table : DataFrame
    """
    meta_ss, scene_ss, crowd_ss = seed_seq.spawn(3)
    meta = _image_layout(index, np.random.default_rng(meta_ss), prefix)
    height, width = tile_shape
    shape = (height * tiles_per_image, width)
    quiet_rows = None
    if meta["quiet_fraction"] is not None and tiles_per_image > 1:
        k = int(meta["quiet_fraction"] * tiles_per_image)
        # The margin keeps fans from vents outside the band from reaching into its tile.
        quiet_rows = (k * height - _QUIET_MARGIN_PX, (k + 1) * height + _QUIET_MARGIN_PX)
    image, truth, negatives, _ = _render_scene(
        shape, np.random.default_rng(scene_ss), scenario=meta["scenario"], wind_deg=None, density=1.0, nodata=None,
        settings=settings, quiet_rows=quiet_rows,
    )
    pixels = to_uint8(image)
    tile_ids = [f"{meta['image_id']}_T{k:02d}" for k in range(tiles_per_image)]
    crowd_rng = np.random.default_rng(crowd_ss)
    classifications = crowd_rng.integers(20, 31, tiles_per_image)
    tiles_table = pd.DataFrame(
        {
            "tile_id": tile_ids,
            "image_id": meta["image_id"],
            "path": [f"images/{t}.png" for t in tile_ids],
            "solar_longitude_deg": meta["solar_longitude_deg"],
            "region": meta["region"],
            "classifications": classifications,
            "col0": 0,
            "row0": np.arange(tiles_per_image) * height,
            "metres_per_px": meta["metres_per_px"],
        }
    )
    tiled = _tile_truth(truth, tile_shape, tiles_per_image)
    neg = pd.DataFrame({"x_px": negatives[:, 0], "y_px": negatives[:, 1]})
    neg = _tile_truth(neg, tile_shape, tiles_per_image)
    # Volunteers cannot mark what lies in no-data.
    neg = neg.loc[pixels[np.round(neg["y_px"] + neg["tile"] * height).astype(int), np.round(neg["x_px"]).astype(int)] > 0]
    consensus = _crowd(tiled, neg.reset_index(drop=True), classifications, tile_shape, crowd_rng)
    truth_table = tiled.assign(votes=classifications[tiled["tile"].to_numpy()], fan_vote_share=(tiled["kind"] == "fan").astype(float))
    ids = np.array(tile_ids, dtype=object)
    truth_table = _finish_table(truth_table.assign(tile_id=ids[truth_table["tile"].to_numpy()]))
    consensus_table = _finish_table(consensus.assign(tile_id=ids[consensus["tile"].to_numpy()]))
    tiles = [(tile_ids[k], pixels[k * height : (k + 1) * height]) for k in range(tiles_per_image)]
    return tiles, tiles_table, truth_table, consensus_table


def _finish_table(table):
    """Contract columns, rounded to 3 decimals, angles re-wrapped, rows in a stable order."""
    table = table.loc[:, list(CONSENSUS_COLUMNS)].copy()
    floats = ["x_px", "y_px", "direction_deg", "length_px", "opening_deg", "semi_major_px", "semi_minor_px", "fan_vote_share"]
    table[floats] = table[floats].astype(float).round(3)
    period = np.where(table["kind"] == "fan", 360.0, 180.0)
    table["direction_deg"] = (table["direction_deg"] % period).round(3) % period
    table["votes"] = table["votes"].astype(int)
    return table.sort_values(["tile_id", "y_px", "x_px", "kind"], kind="mergesort").reset_index(drop=True)


def _check_int(name, value, minimum):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise DetectorError(f"{name} must be an integer >= {minimum}; got {value!r}.")
    return int(value)


def synthesize_tileset(out, *, n_images, tiles_per_image, seed, tile_shape=(600, 800), force=False, settings=None,
                       image_prefix="SYN"):
    """Write an invented tile set of synthetic frost scenes with truth and crowd consensus.

    Each image is one invented orbital image (ids ``SYN_0001_A``...), rendered
    by :func:`render_scene` as a vertical strip of ``tiles_per_image`` adjacent
    tiles; images cycle through windy, two-wind, calm and faint scenes.

    Parameters
    ----------
    out : path-like
        Output folder; receives ``tiles.csv``, ``consensus.csv``, ``truth.csv``
        and ``images/<tile_id>.png`` (8-bit).
    n_images : int
        Number of source images, >= 1.
    tiles_per_image : int
        Tiles per image, >= 1; tile ``k`` of an image has ``col0 = 0`` and
        ``row0 = k * rows``.
    seed : int
        Seed; the same arguments give byte-identical files. Images draw from
        independent streams (``numpy.random.SeedSequence(seed).spawn``), so
        image ``i`` does not depend on ``n_images``.
    tile_shape : tuple of int, optional
        Tile shape (rows, cols), px.
    force : bool, optional
        Replace a non-empty ``out``.
    settings : SceneSettings or str, optional
        Ranges every image draws from, or a preset name in
        :data:`SCENE_PROFILES`; ``None`` means ``"nominal"``. The files do not
        record it: the caller knows which profile it asked for.
    image_prefix : str, optional
        First part of every image id (``<prefix>_0001_A``...), so that tile sets
        rendered for different purposes never share an image id.

    Returns
    -------
    pathlib.Path
        The output folder.

    Raises
    ------
    DetectorError
        Bad arguments, or ``out`` is not empty and ``force`` is false.
    """
    if not isinstance(image_prefix, str) or not image_prefix.replace("_", "").isalnum():
        raise DetectorError(f"image_prefix must be letters, digits or underscores; got {image_prefix!r}.")
    n_images = _check_int("n_images", n_images, 1)
    tiles_per_image = _check_int("tiles_per_image", tiles_per_image, 1)
    seed = _check_int("seed", seed, 0)
    settings = _resolve_settings(settings)
    try:
        tile_shape = tuple(int(v) for v in tile_shape)
    except (TypeError, ValueError) as err:
        raise DetectorError(f"tile_shape {tile_shape!r} is not a pair of integers (rows, cols).") from err
    if len(tile_shape) != 2 or min(tile_shape) < 32:
        raise DetectorError(f"tile_shape {tile_shape!r} must be two integers (rows, cols), each >= 32.")
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise DetectorError(f"output {str(out)!r} exists and is not a folder.")
    occupied = out.is_dir() and any(out.iterdir())
    if occupied and not force:
        raise DetectorError(f"output folder {str(out)!r} is not empty; use force=True (--force) to replace it.")

    parts = [
        _synthesize_image(i, ss, tiles_per_image, tile_shape, settings, image_prefix)
        for i, ss in enumerate(np.random.SeedSequence(seed).spawn(n_images))
    ]
    tiles_table = pd.concat([p[1] for p in parts], ignore_index=True)
    tiles_table = tiles_table.loc[:, list(TILES_REQUIRED + TILES_OPTIONAL)]
    truth = pd.concat([p[2] for p in parts], ignore_index=True)
    consensus = pd.concat([p[3] for p in parts], ignore_index=True)
    with atomic_dir(out) as tmp:
        for tiles, *_ in parts:
            for tile_id, pixels in tiles:
                write_image(tmp / "images" / f"{tile_id}.png", pixels)
        tiles_table.to_csv(tmp / TILES_FILE, index=False, lineterminator="\n")
        truth.to_csv(tmp / TRUTH_FILE, index=False, lineterminator="\n", float_format="%.3f")
        consensus.to_csv(tmp / CONSENSUS_FILE, index=False, lineterminator="\n", float_format="%.3f")
        if occupied:
            # Everything new is complete; only now does the old content go.
            shutil.rmtree(out)
    return out
