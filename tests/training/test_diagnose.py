"""Error analysis on hand-made catalogs: one case per outcome, built so the right outcome is obvious.

Geometry used below: a fan with apex (x, y), direction 90 deg (pointing right,
+x), length L and spread s covers the pixels right of its apex within L px and
s / 2 deg of the +x axis; its match radius is max(12, 0.3 L) px. A spot's
match radius is max(10, semi_major) px.
"""

import json

import numpy as np
import pandas as pd
import pytest

from detector.errors import DetectorError
from detector.labels import rasterise_features
from training.evaluation import diagnose
from training.evaluation.diagnose import (
    CONSENSUS_OUTCOMES,
    DETECTION_OUTCOMES,
    error_breakdown,
    footprint_overlaps,
    plot_error_tiles,
    worst_tiles,
)
from training.evaluation.matching import match_objects


def _fan(tile, x, y, d=90.0, length=40.0, spread=30.0, votes=5):
    return dict(tile_id=tile, kind="fan", x_px=float(x), y_px=float(y), direction_deg=d, length_px=length,
                opening_deg=spread, semi_major_px=np.nan, semi_minor_px=np.nan, votes=votes)


def _spot(tile, x, y, semi=6.0, votes=5):
    return dict(tile_id=tile, kind="spot", x_px=float(x), y_px=float(y), direction_deg=0.0, length_px=np.nan,
                opening_deg=np.nan, semi_major_px=semi, semi_minor_px=semi * 0.7, votes=votes)


def _tiles(*ids, size=200):
    return pd.DataFrame({"tile_id": list(ids), "image_id": [f"img_{t}" for t in ids], "width": size,
                         "height": size})


def _run(cons_rows, det_rows, tiles, **kw):
    cons = pd.DataFrame(cons_rows, columns=list(_fan("t", 0, 0)))
    det = pd.DataFrame(det_rows, columns=list(_fan("t", 0, 0)))
    return error_breakdown(det, cons, tiles, **kw)


def _outcomes(b):
    return list(b.consensus["outcome"]), list(b.detections["outcome"])


def test_detected_fan_two_px_away_is_matched_and_true():
    b = _run([_fan("t", 50, 50)], [_fan("t", 52, 50)], _tiles("t"))
    assert _outcomes(b) == (["matched"], ["true"])
    assert b.consensus["direction_quality"].tolist() == ["ok"]
    assert b.consensus["det_index"].tolist() == [0] and b.detections["cons_index"].tolist() == [0]


@pytest.mark.parametrize("det_dir, quality", [(90.0, "ok"), (150.0, "direction_off"), (270.0, "flipped")])
def test_direction_quality_of_matched_fans(det_dir, quality):
    # Same apex; error 0, 60 and 180 deg against thresholds 45 and 135.
    b = _run([_fan("t", 50, 50)], [_fan("t", 50, 50, d=det_dir)], _tiles("t"))
    assert b.consensus["outcome"].tolist() == ["matched"]
    assert b.consensus["direction_quality"].tolist() == [quality]
    assert b.headline["matched_fans"][quality] == 1.0


def test_spot_detected_on_a_fan_is_as_other_kind():
    # The spot's centre is 10 px from the fan apex, inside the sector and the 12 px radius.
    b = _run([_fan("t", 50, 50)], [_spot("t", 60, 50)], _tiles("t"))
    assert _outcomes(b) == (["as_other_kind"], ["on_other_kind"])
    assert b.headline["consensus"]["fan"]["as_other_kind"] == 1.0


def test_fan_detected_on_a_spot_is_as_other_kind():
    b = _run([_spot("t", 100, 100, semi=8.0)], [_fan("t", 98, 100)], _tiles("t"))
    assert _outcomes(b) == (["as_other_kind"], ["on_other_kind"])


def test_detection_far_from_the_apex_but_on_the_sector_is_source_misplaced():
    # Radius max(12, 0.3 * 80) = 24 px; the detected apex is 40 px down the consensus fan's axis.
    b = _run([_fan("t", 50, 100, length=80.0, spread=40.0)], [_fan("t", 90, 100)], _tiles("t"))
    assert _outcomes(b) == (["source_misplaced"], ["misplaced"])
    assert b.consensus["distance_px"].tolist() == [40.0]
    assert b.consensus["overlap_px"].iloc[0] > 0


def test_a_detection_smaller_than_a_pixel_keeps_its_apex_pixel():
    # A 0.4-px fan covers no pixel centre but its apex pixel, 40 px down the consensus fan's axis.
    b = _run([_fan("t", 50, 100, length=80.0, spread=40.0)], [_fan("t", 90.2, 100.1, length=0.4)], _tiles("t"))
    assert _outcomes(b) == (["source_misplaced"], ["misplaced"])
    assert b.detections["overlap_px"].tolist() == [1]


def test_one_wide_detection_over_two_fans_of_one_vent_merges_them():
    # Two 20-deg fans at 80 and 100 deg from one vent; one 60-deg detection at 80 deg covers both.
    cons = [_fan("t", 50, 100, d=80.0, length=60.0, spread=20.0), _fan("t", 50, 100, d=100.0, length=60.0, spread=20.0)]
    b = _run(cons, [_fan("t", 50, 100, d=80.0, length=60.0, spread=60.0)], _tiles("t"))
    assert _outcomes(b) == (["matched", "merged"], ["true"])
    assert b.consensus["det_index"].tolist() == [0, 0]


def test_lonely_consensus_fan_is_missed_and_detection_in_empty_space_is_background():
    b = _run([_fan("t", 20, 20)], [_fan("t", 150, 150), _spot("u", 50, 50)], _tiles("t", "u"))
    assert _outcomes(b) == (["missed"], ["background", "background"])
    assert b.consensus["det_index"].isna().all() and b.detections["cons_index"].isna().all()


def test_two_detections_on_one_fan_give_one_true_and_one_duplicate():
    b = _run([_fan("t", 50, 50)], [_fan("t", 51, 50), _fan("t", 55, 50)], _tiles("t"))
    assert _outcomes(b) == (["matched"], ["true", "duplicate"])
    assert b.detections["cons_index"].tolist() == [0, 0]


def test_a_spot_matched_elsewhere_does_not_explain_a_lost_fan():
    # A consensus spot sits on the consensus fan; the detected spot matches the spot, so the fan is missed.
    cons = [_fan("t", 50, 50), _spot("t", 60, 50)]
    b = _run(cons, [_spot("t", 60, 50)], _tiles("t"))
    assert _outcomes(b) == (["missed", "matched"], ["true"])


def test_precedence_other_kind_before_misplaced_and_duplicate_before_other_kind():
    # Consensus fan with a free spot on it and a free fan 40 px down its axis: as_other_kind wins.
    b = _run([_fan("t", 50, 100, length=80.0, spread=40.0)], [_spot("t", 60, 100), _fan("t", 90, 100)], _tiles("t"))
    assert _outcomes(b) == (["as_other_kind"], ["on_other_kind", "misplaced"])
    # A second detected fan on a matched fan that also covers a consensus spot: duplicate wins.
    b = _run([_fan("t", 50, 50), _spot("t", 70, 50)], [_fan("t", 50, 50), _fan("t", 52, 50)], _tiles("t"))
    assert b.detections["outcome"].tolist() == ["true", "duplicate"]
    # The sides are assigned independently: that free fan still touches the spot, so the spot is as_other_kind.
    assert b.consensus["outcome"].tolist() == ["matched", "as_other_kind"]


def test_overlap_equals_the_project_rasteriser():
    # Reference: detector.labels.rasterise_features, pixel-centre masks of each feature alone.
    cons = pd.DataFrame([_fan("t", 40, 60, d=100.0, length=50.0, spread=35.0)])
    det = pd.DataFrame([_fan("t", 70, 55, d=120.0, length=45.0, spread=50.0), _spot("t", 60, 70, semi=9.0)])
    edges = footprint_overlaps(det, cons, {"t": (120, 160)})
    c = rasterise_features(cons, (120, 160)).fan_cover
    for i, cover in ((0, "fan_cover"), (1, "spot_cover")):
        d = getattr(rasterise_features(det.iloc[[i]], (120, 160)), cover)
        expected = int((c & d).sum())
        assert expected > 0
        assert edges.loc[edges["det_index"] == i, "overlap_px"].item() == expected


def _random_scene(seed):
    rng = np.random.default_rng(seed)
    cons, det = [], []
    for t in ("a", "b", "c", "d"):
        for _ in range(8):
            x, y = rng.uniform(10, 190, 2)
            d = rng.uniform(0, 360)
            if rng.random() < 0.7:
                cons.append(_fan(t, x, y, d=d, length=rng.uniform(10, 80), votes=int(rng.integers(3, 30))))
            else:
                cons.append(_spot(t, x, y, semi=rng.uniform(3, 15), votes=int(rng.integers(3, 30))))
            if rng.random() < 0.8:
                jitter = rng.normal(0, 10, 2)
                if rng.random() < 0.75:
                    det.append(_fan(t, x + jitter[0], y + jitter[1], d=(d + rng.normal(0, 60)) % 360,
                                    length=rng.uniform(10, 80)))
                else:
                    det.append(_spot(t, x + jitter[0], y + jitter[1], semi=rng.uniform(3, 15)))
    return pd.DataFrame(cons), pd.DataFrame(det), _tiles("a", "b", "c", "d")


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_every_feature_has_exactly_one_outcome_and_matches_equal_the_matcher(seed):
    cons, det, tiles = _random_scene(seed)
    b = error_breakdown(det, cons, tiles)
    assert b.consensus.index.equals(cons.index) and b.detections.index.equals(det.index)
    assert b.consensus["outcome"].isin(CONSENSUS_OUTCOMES).all()
    assert b.detections["outcome"].isin(DETECTION_OUTCOMES).all()
    # Reference: the project's matcher.
    pairs = match_objects(det, cons)
    assert (b.consensus["outcome"] == "matched").sum() == len(pairs)
    assert (b.detections["outcome"] == "true").sum() == len(pairs)
    assert set(b.consensus.index[b.consensus["outcome"] == "matched"]) == set(pairs["cons_index"])
    # Direction quality exactly for matched fans.
    has_q = b.consensus["direction_quality"].notna()
    assert (has_q == ((b.consensus["outcome"] == "matched") & (b.consensus["kind"] == "fan"))).all()
    # Merged features point at a detection that is true; duplicates at a matched consensus feature.
    merged = b.consensus[b.consensus["outcome"] == "merged"]
    assert (b.detections.loc[merged["det_index"].astype(int), "outcome"] == "true").all()
    dup = b.detections[b.detections["outcome"] == "duplicate"]
    assert (b.consensus.loc[dup["cons_index"].astype(int), "outcome"] == "matched").all()
    # Shares of each side and kind add up to one, and the tallies count every feature once.
    for side in ("consensus", "detections"):
        for entry in b.headline[side].values():
            if entry["n"]:
                assert sum(v for k, v in entry.items() if k != "n") == pytest.approx(1.0)
    by_image = b.by_image
    assert by_image.loc[by_image["side"] == "consensus", "n"].sum() == len(cons)
    assert by_image.loc[by_image["side"] == "detections", "n"].sum() == len(det)
    assert b.by_votes["n"].sum() == len(cons)
    assert b.by_length["n"].sum() == (cons["kind"] == "fan").sum()
    json.dumps(b.to_dict(), allow_nan=False)


def test_given_pairs_are_used_and_the_result_is_deterministic():
    cons, det, tiles = _random_scene(5)
    pairs = match_objects(det, cons)
    a = error_breakdown(det, cons, tiles, pairs=pairs)
    b = error_breakdown(det, cons, tiles)
    pd.testing.assert_frame_equal(a.consensus, b.consensus)
    pd.testing.assert_frame_equal(a.detections, b.detections)
    # With no pairs given as matched, nothing is matched.
    none = error_breakdown(det, cons, tiles, pairs=pairs.iloc[:0])
    assert not (none.consensus["outcome"] == "matched").any()


def test_length_bins_by_hand():
    # Lengths 10, 30, 40, 100 fall in <20, 20-35, 35-56, >=56; only the 30-px fan is detected.
    cons = [_fan("t", 20, 20, length=10.0), _fan("t", 20, 100, length=30.0), _fan("t", 100, 20, length=40.0),
            _fan("t", 100, 100, length=100.0, spread=10.0)]
    b = _run(cons, [_fan("t", 20, 100)], _tiles("t"))
    got = b.by_length.set_index(["length_bin", "outcome"])["n"]
    assert got[("<20", "missed")] == 1 and got[("20-35", "matched")] == 1
    assert got[("35-56", "missed")] == 1 and got[(">=56", "missed")] == 1
    assert list(dict.fromkeys(b.by_length["length_bin"])) == ["<20", "20-35", "35-56", ">=56"]


def test_empty_catalogs():
    b = _run([], [], _tiles("t"))
    assert len(b.consensus) == 0 and len(b.detections) == 0
    assert b.headline["consensus"]["fan"]["missed"] is None
    assert worst_tiles(b).empty


@pytest.mark.parametrize(
    "kw, match",
    [({"min_overlap_px": 0}, "min_overlap_px 0"), ({"flip_deg": 30.0}, "flip_deg 30.0"),
     ({"length_bins": (0, 20, 10)}, "length_bins")],
)
def test_bad_settings_are_named(kw, match):
    with pytest.raises(DetectorError, match=match):
        _run([_fan("t", 50, 50)], [], _tiles("t"), **kw)


def test_bad_tables_are_named():
    with pytest.raises(DetectorError, match="'zz' is not in tiles"):
        _run([_fan("zz", 50, 50)], [], _tiles("t"))
    with pytest.raises(DetectorError, match="width"):
        _run([_fan("t", 50, 50)], [], _tiles("t").drop(columns="width"))
    with pytest.raises(DetectorError, match="not finite"):
        _run([_fan("t", np.nan, 50)], [], _tiles("t"))


def test_worst_tiles_and_their_figures(tmp_path):
    # Tile u: one missed fan and two background detections (3 errors); tile t: one missed fan (1 error).
    b = _run([_fan("t", 20, 20), _fan("u", 20, 20)], [_fan("u", 150, 150), _spot("u", 100, 30), _fan("v", 50, 50, d=0)],
             _tiles("t", "u", "v"))
    worst = worst_tiles(b, n_tiles=2)
    assert worst["tile_id"].tolist() == ["u", "t"] and worst["n_errors"].tolist() == [3, 1]
    written = plot_error_tiles(b, lambda tid: np.full((200, 200), 7.0), tmp_path / "worst_tiles", n_tiles=2)
    assert [p.name for p in written] == ["worst_u.png", "worst_t.png"]
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in written)


def test_public_api_listed():
    import training

    assert "error_breakdown" in diagnose.__all__
    assert training.error_breakdown is error_breakdown


def test_diagnose_catalogs_without_a_model(tiny_tileset, tmp_path):
    # The tile set's noise-free truth scored as detections: every output is written and self-consistent.
    from training.evaluation.diagnose import diagnose_catalogs

    out = tmp_path / "diag"
    b = diagnose_catalogs(tiny_tileset / "truth.csv", tiny_tileset, out)
    cons = pd.read_csv(out / "errors_consensus.csv")
    det = pd.read_csv(out / "errors_detections.csv")
    assert len(cons) == len(b.consensus) and len(det) == len(b.detections)
    assert cons["cons_index"].tolist() == list(range(len(cons)))
    summary = json.loads((out / "error_breakdown.json").read_text())
    assert sorted(p.name for p in (out / "worst_tiles").glob("*.png")) == sorted(
        w["figure"].split("/")[-1] for w in summary["worst_tiles"])
    with pytest.raises(DetectorError, match="not empty"):
        diagnose_catalogs(tiny_tileset / "truth.csv", tiny_tileset, out)


def _readme_table_columns(heading):
    """Column names listed in the README table that follows the line starting with ``heading``."""
    import re
    from pathlib import Path

    lines = (Path(__file__).resolve().parents[2] / "README.md").read_text().splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith(heading))
    names = []
    for line in lines[start + 1:]:
        if names and not line.startswith("|"):
            break
        if line.startswith("| `"):
            names.append(re.findall(r"`([^`]+)`", line.split("|")[1]))
    return names


@pytest.mark.parametrize(("heading", "name", "first"), [
    ("`errors_consensus.csv`, one row", "errors_consensus.csv", "cons_index"),
    ("`errors_detections.csv`, one row", "errors_detections.csv", "det_index"),
])
def test_error_tables_have_the_columns_the_readme_lists(tiny_tileset, tmp_path, heading, name, first):
    # Every column written is documented, in order; a "`a` ... `b`" row stands for the contract's
    # run of columns from a to b.
    from detector.contract import DETECTION_COLUMNS
    from training.evaluation.diagnose import diagnose_catalogs

    # the truth as a detection catalog with every column of evaluate's detections.csv
    detections = pd.read_csv(tiny_tileset / "truth.csv").assign(score=1.0, direction_confidence=1.0)
    detections.reindex(columns=DETECTION_COLUMNS).to_csv(tmp_path / "detections.csv", index=False)
    out = tmp_path / "diag"
    diagnose_catalogs(tmp_path / "detections.csv", tiny_tileset, out)
    written = list(pd.read_csv(out / name, nrows=0).columns)
    documented = []
    for names in _readme_table_columns(heading):
        if len(names) == 2 and names[0] in DETECTION_COLUMNS:  # a run of contract columns
            run = list(DETECTION_COLUMNS)
            documented += run[run.index(names[0]):run.index(names[1]) + 1]
        else:
            documented += names
    assert documented[0] == first
    assert written == documented
