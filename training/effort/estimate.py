"""The effort left on routed tiles: classifications still needed (and truly needed, given each tile's presence
probability), hours and dates, the machine route's measured promise, and their bootstrap over held-out images.
"""


import numpy as np
import pandas as pd

from detector.errors import DetectorError
from detector.inference.unfamiliar import DEFAULT_PASS_SHARE

from .._json import jsonable as _jsonable
from .campaign import DEFAULT_CLASSIFICATIONS_NEEDED, Campaign, date_range, days_for, remaining_classifications
from .presence import presence_coefficients, presence_probability
from .routing import (
    _candidate_grid,
    _check_settings,
    _CODE,
    _columns,
    _held_routes,
    _heldout_frame,
    _machine_eligible,
    _measure,
    _quiet_nanmedian,
    _route_codes,
    _screen_arrays,
    _thresholds,
    _unfamiliar_cut,
    DEFAULT_MAX_DIRECTION_ERROR,
    DEFAULT_MIN_F1,
    DEFAULT_MIN_TILES,
    DEFAULT_RECALL,
    pooled_f1,
    ROUTES,
)

__all__ = [
    "deposit_probability",
    "estimate_effort",
    "effort_summary",
]


def deposit_probability(heldout_p, heldout_has_deposit, p):
    """Probability that a tile holds consensus deposits, given its p_deposit, learned on held-out tiles.

    A logistic regression of the held-out tiles' 0/1 deposit indicator on
    ``logit(p_deposit)`` with Firth's penalty, held non-decreasing
    (:mod:`training.effort.presence`, where the choice over the isotonic fit used
    before is measured).

    Parameters
    ----------
    heldout_p : ndarray of shape (m,)
    heldout_has_deposit : ndarray of shape (m,), bool
    p : ndarray of shape (n,)
        Deposit probabilities to read the fit at; NaN gives 1 (unknown tiles are
        counted as needing people).

    Returns
    -------
    q : ndarray of shape (n,), in (0, 1]
    """
    return presence_probability(presence_coefficients(heldout_p, heldout_has_deposit), p)


def _aligned_have(routed_df, have):
    if have is None:
        return np.zeros(len(routed_df), dtype=np.int64)
    keyed = pd.Series(have).reindex(routed_df["tile_id"].astype(str).to_numpy())
    return keyed.fillna(0).to_numpy(np.int64)


def _needed_weights(q, code, unfamiliar):
    """Per-tile probability that the tile truly needs people: deposits there, and not the machine's."""
    w = q.copy()
    w[unfamiliar] = 1.0  # the p_deposit of an unfamiliar tile is not to be trusted
    w[code == _CODE["machine"]] = 0.0
    w[code == _CODE["nodata"]] = 0.0
    return w


def estimate_effort(routed_df, card, *, campaign=None, have=None, seed=0, n_boot=1000):
    """Volunteer effort left after routing, with bootstrap intervals over held-out images.

    Parameters
    ----------
    routed_df : DataFrame
        Output of :func:`route_tiles` (its ``attrs["thresholds"]`` give the
        settings re-used by the bootstrap).
    card : dict
        Model card with ``heldout_tiles``.
    campaign : Campaign, optional
        Classifications needed per tile, seconds per classification, throughput.
    have : Series of int indexed by tile_id, optional
        Classifications each tile already has; tiles it does not list have none.
    seed : int, default=0
    n_boot : int, default=1000
        Bootstrap replicates: the held-out images are resampled with
        replacement, the thresholds re-derived, the screened tiles re-routed and
        the promises measured on the images each resample left out.

    Returns
    -------
    effort : dict
        JSON-ready. ``classifications`` (what the crowd tiles still need),
        ``hours``, ``by_route`` (what each route's tiles would still need, so the
        classifications the skip and machine routes save), ``expected_needed``
        (classifications on tiles that truly need people, estimated through the
        probability that each tile holds deposits, with a 90 % prediction
        interval that also draws each tile's presence; see
        :func:`_bootstrap`), ``days`` and ``dates`` with throughput,
        ``interval_90``, ``machine`` (measured on held-out tiles, with
        ``spread``: the out-of-bag interval, or the range over the images
        when fewer than five held-out images carry machine tiles) and
        ``missed_deposit_share``, ``thresholds``, ``campaign``, ``assumptions``.
    """
    campaign = Campaign() if campaign is None else campaign
    if isinstance(n_boot, bool) or not isinstance(n_boot, (int, np.integer)) or n_boot < 1:
        raise DetectorError(f"bootstrap replicates must be a whole number >= 1; got {n_boot!r}.")
    notes = dict(routed_df.attrs.get("thresholds", {}))
    settings = {"recall": notes.get("recall", DEFAULT_RECALL), "min_f1": notes.get("min_f1", DEFAULT_MIN_F1),
                "max_direction_error": notes.get("max_direction_error_deg", DEFAULT_MAX_DIRECTION_ERROR),
                "min_tiles": notes.get("min_tiles", DEFAULT_MIN_TILES),
                "pass_share": notes.get("pass_share", DEFAULT_PASS_SHARE)}
    _check_settings(**settings)
    held = _heldout_frame(card)
    col = _columns(held)
    skip, machine, cut = _thresholds(col, **settings)

    route = routed_df["route"].astype(str).to_numpy()
    code = np.array([_CODE.get(r, _CODE["crowd"]) for r in route], dtype=np.int8)
    nodata, p, unf, conf, n_det = _screen_arrays(routed_df)
    if "confidence" in routed_df.columns:
        conf = routed_df["confidence"].to_numpy(np.float64)
    unfamiliar = (unf > cut) & ~nodata
    need = int(campaign.classifications_needed)
    have_arr = _aligned_have(routed_df, have)
    rem = remaining_classifications(have_arr, need)
    rem[nodata] = 0
    by_route = {r: int(rem[code == _CODE[r]].sum()) for r in ("skip", "machine", "crowd")}
    workload = by_route["crowd"]
    deposit = col["consensus_px"] > 0
    q = deposit_probability(col["p_deposit"], deposit, p)
    needed = float(np.sum(rem * _needed_weights(q, code, unfamiliar)))
    skipped = code == _CODE["skip"]
    boot = _bootstrap(col, (nodata, p, unf, conf, n_det > 0), rem, settings, skipped=skipped, seed=seed,
                      n_boot=n_boot)
    per_hour = campaign.seconds / 3600.0
    held_code = _held_routes(col, skip, machine, cut)
    measured = _measure(col, held_code)

    def iv(values):
        v = np.asarray(values, dtype=np.float64)
        v = v[np.isfinite(v)]
        return [float(x) for x in np.percentile(v, [5.0, 95.0])] if len(v) else None

    work_iv = iv(boot["workload"])
    needed_iv = iv(boot["needed"])
    spread = _machine_spread(col, held_code, iv(boot["machine_f1"]), iv(boot["machine_direction_median_deg"]))
    per_day = campaign.classifications_per_day
    days = days_for(workload, per_day)
    days_iv = None if per_day is None else [days_for(v, per_day) for v in work_iv]
    dates = None if per_day is None else list(date_range(days_iv[0], days_iv[1], campaign.start_date))
    active = ~nodata
    with_det = active & (n_det > 0)
    effort = {
        "campaign": campaign.describe(),
        "tiles": {"total": int(len(routed_df)), **{r: int(np.sum(code == _CODE[r])) for r in ROUTES},
                  "unfamiliar": int(np.sum(unfamiliar)), "finished": int(np.sum(active & (rem == 0))),
                  "with_detections": int(with_det.sum()),
                  "skipped_with_detections": int(np.sum(with_det & (code == _CODE["skip"])))},
        "machine_share_of_tiles_with_detections": float(np.sum(with_det & (code == _CODE["machine"])) / with_det.sum())
        if with_det.any() else None,
        "classifications": workload,
        "hours": workload * per_hour,
        "by_route": {r: {"classifications": v, "hours": v * per_hour} for r, v in by_route.items()},
        "classifications_without_routing": int(rem[active].sum()),
        "hours_without_routing": float(rem[active].sum() * per_hour),
        "expected_needed": {
            "classifications": needed, "hours": needed * per_hour,
            "interval_90": needed_iv,
            "interval_90_calibration_only": iv(boot["needed_expected"]),
            "on_skipped_tiles": {"classifications": float(np.sum((rem * q)[skipped])),
                                 "interval_90": iv(boot["needed_skipped"])},
            "on_unfamiliar_tiles": int(rem[unfamiliar & (code == _CODE["crowd"])].sum()),
            "method": "sum over tiles of the classifications left times the probability that the tile holds "
                      "consensus deposits (logistic fit of held-out presence on logit(p_deposit), Firth's "
                      "penalty); unfamiliar tiles count in full, machine tiles not at all. 90% prediction "
                      "interval: parametric bootstrap, each resample of held-out images refits that probability "
                      "and re-routes the tiles, then draws every tile's presence from it",
        },
        "days": days,
        "dates": dates,
        "interval_90": {
            "classifications": work_iv,
            "hours": None if work_iv is None else [v * per_hour for v in work_iv],
            "days": days_iv,
            "missed_deposit_share": iv(boot["missed_deposit_share"]),
            "machine_f1": iv(boot["machine_f1"]),
            "machine_direction_median_deg": iv(boot["machine_direction_median_deg"]),
            "machine_deposit_share": iv(boot["machine_deposit_share"]),
            "resamples_with_machine_route": float(np.mean(np.isfinite(boot["machine"]))),
            "n_boot": int(n_boot),
            "seed": int(seed),
            "method": "percentile bootstrap over held-out images: thresholds re-derived and screened tiles "
                      "re-routed for each resample; promises measured on the images the resample left out",
        },
        "missed_deposit_share": measured["missed_deposit_share"],
        "machine": {**measured, "heldout_images": spread["images"], "spread": spread},
        "thresholds": {**notes, "skip_p_deposit": skip, "machine_confidence": machine,
                       "unfamiliar_cut": None if not np.isfinite(cut) else float(cut)},
        "heldout": {"tiles": int(len(held)), "images": int(len(np.unique(col["image_id"]))),
                    "deposit_tiles": int(deposit.sum()), "deposit_px": float(held["consensus_px"].sum())},
        "assumptions": [
            f"{need} classifications make a tile's consensus final"
            + (" (default: common practice retires a tile after about 20-30)" if need == DEFAULT_CLASSIFICATIONS_NEEDED
               else ""),
            f"{campaign.seconds:g} s per classification" + (" (assumed; use your campaign's figure)"
                                                           if campaign.seconds_assumed else ""),
            "tiles the campaign's classifications do not list have none yet" if have is not None
            else "no tile has any classification yet (no classifications given)",
            "machine and skip tiles need no volunteer classifications",
        ],
    }
    return _jsonable(effort)


def _machine_spread(col, held_code, f1_iv, direction_iv):
    """How far the machine's held-out promise can be trusted: an interval, or only a range of few images.

    The out-of-bag bootstrap interval needs at least
    :data:`training.evaluation.bootstrap.MIN_IMAGES_FOR_CI` held-out images carrying
    machine tiles; with fewer, the pooled F1 and median direction error of
    each such image are given as their range (min, max), which is no interval
    and says so.
    """
    from ..evaluation.bootstrap import MIN_IMAGES_FOR_CI

    machine = held_code == _CODE["machine"]
    images = np.unique(col["image_id"][machine])
    if len(images) == 0:
        return {"kind": "none", "images": 0, "f1": None, "direction_median_deg": None,
                "label": "no held-out tile reaches the machine route"}
    if len(images) >= MIN_IMAGES_FOR_CI:
        return {"kind": "interval", "images": int(len(images)), "f1": f1_iv, "direction_median_deg": direction_iv,
                "label": f"90% out-of-bag bootstrap interval over held-out images ({len(images)} images carry "
                         f"machine tiles)"}
    f1, err = [], []
    for image in images:
        tiles = machine & (col["image_id"] == image)
        f1.append(pooled_f1(col["n_matched"][tiles], col["n_detections"][tiles], col["n_consensus"][tiles]))
        with _quiet_nanmedian():
            err.append(float(np.nanmedian(col["fan_error_median_deg"][tiles])))

    def span(values):
        v = np.asarray(values, dtype=np.float64)
        v = v[np.isfinite(v)]
        return [float(v.min()), float(v.max())] if len(v) else None

    return {"kind": "range", "images": int(len(images)), "f1": span(f1), "direction_median_deg": span(err),
            "label": f"range over the {len(images)} held-out image(s) carrying machine tiles (fewer than "
                     f"{MIN_IMAGES_FOR_CI}: too few for an interval)"}


def _bootstrap(col, screen_arrays, rem, settings, *, skipped, seed, n_boot):
    """Workload, needed classifications and out-of-bag promises over resamples of held-out images.

    The classifications truly needed get a prediction interval by a parametric
    bootstrap (Davison and Hinkley, Bootstrap Methods and their Application,
    1997, chapter 6: resample the fit, then simulate the new outcome from the
    resampled fit; the chapter from memory). Each resample of held-out images
    (images, not tiles: the tiles of one image are not independent) refits the
    presence calibration and re-routes the screened tiles; then each screened
    tile holds deposits with its resampled probability, independently of the
    others. The second step is the variance a resample of the calibration alone
    leaves out: given the probabilities, which tiles truly hold deposits is
    still a sum of Bernoulli draws. Independence of tiles given their
    p_deposit was checked on the shipped model's held-out tiles: the
    presence residuals of tiles of one image are uncorrelated (one-way
    intraclass correlation -0.005 over 48 images of 4 tiles).

    Returns
    -------
    out : dict of ndarray of shape (n_boot,)
        ``workload``, ``needed`` (drawn presence), ``needed_expected``
        (expected value under the resampled calibration alone),
        ``needed_skipped`` (drawn presence on the tiles ``skipped`` marks),
        ``machine`` and the out-of-bag promises.
    """
    rng = np.random.default_rng(seed)
    # A separate stream for the presence draws: the resampled images stay those of ``seed``.
    presence_rng = np.random.default_rng([seed, 1])
    nodata, p, unf, conf, has_det = screen_arrays
    images, inverse = np.unique(col["image_id"], return_inverse=True)
    members = [np.flatnonzero(inverse == k) for k in range(len(images))]
    cut_all = _unfamiliar_cut(col["unfamiliarity"], settings["pass_share"])
    candidates = _candidate_grid(col["confidence"][_machine_eligible(col, cut_all)])
    keys = ("workload", "needed", "needed_expected", "needed_skipped", "machine", "missed_deposit_share",
            "machine_f1", "machine_direction_median_deg", "machine_deposit_share")
    out = {k: np.full(n_boot, np.nan) for k in keys}
    picks = rng.integers(0, len(images), size=(n_boot, len(images)))
    # Each resample's calibration at once: a tile counts as often as its image was drawn.
    drawn = np.stack([np.bincount(pick, minlength=len(images)) for pick in picks])[:, inverse]
    coefs = presence_coefficients(col["p_deposit"], col["consensus_px"] > 0, drawn)
    for b, pick in enumerate(picks):
        idx = np.concatenate([members[k] for k in pick])
        sample = {c: v[idx] for c, v in col.items()}
        skip, machine, cut = _thresholds(sample, candidates=candidates, **settings)
        code, unfamiliar = _route_codes(nodata, p, unf, conf, has_det, skip, machine, cut)
        out["workload"][b] = rem[code == _CODE["crowd"]].sum()
        q = presence_probability(None if coefs is None else coefs[b], p)
        w = _needed_weights(q, code, unfamiliar)
        u = presence_rng.random(len(p))
        out["needed_expected"][b] = np.sum(rem * w)
        out["needed"][b] = np.sum(rem[u < w])
        out["needed_skipped"][b] = np.sum(rem[skipped & (u < q)])
        out["machine"][b] = np.nan if machine is None else machine
        left_out = ~np.isin(np.arange(len(images)), pick)
        if left_out.any():
            m = _measure(col, _held_routes(col, skip, machine, cut), subset=left_out[inverse])
            for k in ("missed_deposit_share", "machine_f1", "machine_direction_median_deg", "machine_deposit_share"):
                out[k][b] = m[k]
    return out


def _fmt_iv(values, fmt="{:,.0f}"):
    return "n/a" if not values else f"{fmt.format(values[0])}-{fmt.format(values[1])}"


def effort_summary(effort):
    """One-screen text summary of :func:`estimate_effort`."""
    t = effort["tiles"]
    iv = effort["interval_90"]
    th = effort["thresholds"]
    c = effort["campaign"]
    m = effort["machine"]
    needed = effort["expected_needed"]
    lines = [
        f"tiles: {t['total']} screened - skip {t['skip']}, machine {t['machine']}, crowd {t['crowd']} "
        f"({t['unfamiliar']} unfamiliar), no data {t['nodata']}; {t['finished']} already have "
        f"{c['classifications_needed']} classifications",
        f"unfamiliar: {th.get('unfamiliar_note', '')}",
        f"skip: {th.get('skip_note', '')}" + (f"; {t['skipped_with_detections']} skipped tile(s) hold detections "
                                               f"(see routes.csv, reason)" if t["skipped_with_detections"] else ""),
        f"machine: {th.get('machine_note', '')}",
    ]
    spread = m.get("spread") or {}
    if m["machine_tiles"] and spread.get("kind") == "range":
        lines.append(f"  {spread['label']}: F1 {_fmt_iv(spread['f1'], '{:.2f}')}, direction "
                     f"{_fmt_iv(spread['direction_median_deg'], '{:.1f}')} deg; "
                     f"{iv['resamples_with_machine_route']:.0%} of resamples find a machine route")
    elif m["machine_tiles"]:
        lines.append(f"  measured on held-out images left out by each resample (90%): F1 "
                     f"{_fmt_iv(iv['machine_f1'], '{:.2f}')}, direction {_fmt_iv(iv['machine_direction_median_deg'], '{:.1f}')} "
                     f"deg, deposit tiles taken {_fmt_iv(iv['machine_deposit_share'], '{:.0%}')}; "
                     f"{iv['resamples_with_machine_route']:.0%} of resamples find a machine route")
    if effort.get("machine_share_of_tiles_with_detections") is not None:
        lines.append(f"  here the machine takes {effort['machine_share_of_tiles_with_detections']:.0%} of the "
                     f"{t['with_detections']} screened tiles with detections")
    lines += [
        f"volunteer effort left: {effort['classifications']:,} classifications on the crowd tiles "
        f"(90%: {_fmt_iv(iv['classifications'])}), {effort['hours']:,.1f} h (90%: {_fmt_iv(iv['hours'], '{:,.1f}')}) "
        f"at {c['seconds_per_classification']:g} s each" + (" (assumed)" if c["seconds_assumed"] else ""),
        f"  of which on tiles that truly hold deposits (expected): {needed['classifications']:,.0f} "
        f"(90% prediction interval: {_fmt_iv(needed['interval_90'])}; resampling the calibration alone: "
        f"{_fmt_iv(needed.get('interval_90_calibration_only'))})"
        + (f"; unfamiliar tiles count in full ({needed['on_unfamiliar_tiles']:,})"
           if needed.get("on_unfamiliar_tiles") else ""),
        f"  saved by routing: skip {effort['by_route']['skip']['classifications']:,}, machine "
        f"{effort['by_route']['machine']['classifications']:,} of {effort['classifications_without_routing']:,} "
        f"classifications without routing",
    ]
    on_skipped = needed.get("on_skipped_tiles")
    if on_skipped and t["skip"]:
        lines.append(f"  skipping withholds an expected {on_skipped['classifications']:,.0f} classifications from "
                     f"skipped tiles that hold deposits (90%: {_fmt_iv(on_skipped['interval_90'])})")
    if effort.get("days") is not None:
        lines.append(f"at {c['classifications_per_day']:g} classifications a day: {effort['days']:.1f} days "
                     f"(90%: {_fmt_iv(iv['days'], '{:.1f}')}), done between {effort['dates'][0]} and {effort['dates'][1]}")
    missed = effort["missed_deposit_share"]
    if missed is None:
        lines.append("deposits lost by skipping: unknown (no held-out deposits)")
    else:
        lines.append(f"deposits lost by skipping: {missed:.2%} of the held-out deposit area (90% on left-out "
                     f"images {_fmt_iv(iv['missed_deposit_share'], '{:.2%}')})")
    return "\n".join(lines)
