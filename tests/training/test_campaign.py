"""Campaign inputs: the campaign file, classifications already given, what is left, days and dates."""

import datetime
import json

import numpy as np
import pandas as pd
import pytest

from training.effort.campaign import (
    CAMPAIGN_KEYS,
    DEFAULT_CLASSIFICATIONS_NEEDED,
    Campaign,
    CampaignError,
    date_range,
    days_for,
    read_campaign,
    read_classifications,
    remaining_classifications,
)


def test_default_is_the_common_retirement_count():
    # Common practice (from memory): volunteer marking projects retire a tile after about 20-30
    # classifications; the default takes the upper end.
    assert 20 <= DEFAULT_CLASSIFICATIONS_NEEDED <= 30
    campaign = Campaign()
    assert campaign.seconds_assumed and campaign.seconds == 60.0
    assert campaign.describe()["seconds_assumed"] is True


def test_remaining_is_needed_minus_have_floored_at_zero():
    # Hand values with 30 needed: 0 -> 30, 12 -> 18, 30 -> 0, 41 -> 0 (more than needed is still finished).
    assert remaining_classifications([0, 12, 30, 41], 30).tolist() == [30, 18, 0, 0]
    assert remaining_classifications(np.array([], dtype=int), 30).tolist() == []


def test_days_and_dates_by_hand():
    # 53 classifications at 20 a day: 2.65 days; started on 1 March the work ends by 4 March
    # (whole days counted up); 120 at 20 a day is 6 days exactly: 7 March.
    assert days_for(53, 20) == pytest.approx(2.65)
    assert days_for(53, None) is None
    assert date_range(2.65, 6.0, datetime.date(2026, 3, 1)) == ("2026-03-04", "2026-03-07")
    # Across a month end of a leap year (calendar arithmetic from the standard library).
    assert date_range(0.5, 30.0, datetime.date(2028, 2, 28)) == ("2028-02-29", "2028-03-29")


@pytest.mark.parametrize("suffix", [".json", ".toml"])
def test_read_campaign_json_and_toml(tmp_path, suffix):
    pd.DataFrame({"tile_id": ["a", "b"], "classifications": [3, 30]}).to_csv(tmp_path / "have.csv", index=False)
    if suffix == ".json":
        text = json.dumps({"classifications_needed": 25, "seconds_per_classification": 40,
                           "classifications_per_day": 1500, "start_date": "2026-09-01",
                           "classifications": "have.csv"})
    else:
        text = ('classifications_needed = 25\nseconds_per_classification = 40\nclassifications_per_day = 1500\n'
                'start_date = 2026-09-01\nclassifications = "have.csv"\n')
    path = tmp_path / f"campaign{suffix}"
    path.write_text(text)
    campaign = read_campaign(path)
    assert campaign == Campaign(classifications_needed=25, seconds_per_classification=40,
                                classifications_per_day=1500, start_date=datetime.date(2026, 9, 1),
                                classifications=tmp_path / "have.csv")
    assert not campaign.seconds_assumed
    have = read_classifications(campaign.classifications)
    assert have.to_dict() == {"a": 3, "b": 30}
    # An option overrides the file; None leaves the file's value.
    assert campaign.replace(classifications_needed=20, seconds_per_classification=None).classifications_needed == 20
    assert campaign.replace(seconds_per_classification=None).seconds == 40


@pytest.mark.parametrize("text,match", [
    ('{"classifications_neded": 20}', "unknown key"),
    ('{"classifications_needed": 0}', "classifications_needed"),
    ('{"classifications_needed": 2.5}', "classifications_needed"),
    ('{"seconds_per_classification": -3}', "seconds_per_classification"),
    ('{"classifications_per_day": "many"}', "classifications_per_day"),
    ('{"start_date": "1 March"}', "start_date"),
    ('[1, 2]', "table of keys"),
    ('{"classifications_needed": ', "cannot be read"),
])
def test_bad_campaign_files(tmp_path, text, match):
    path = tmp_path / "c.json"
    path.write_text(text)
    with pytest.raises(CampaignError, match=match):
        read_campaign(path)


def test_campaign_file_errors_name_the_file(tmp_path):
    with pytest.raises(CampaignError, match="does not exist"):
        read_campaign(tmp_path / "none.json")
    (tmp_path / "c.yaml").write_text("a: 1")
    with pytest.raises(CampaignError, match=r"\.json or \.toml"):
        read_campaign(tmp_path / "c.yaml")
    assert set(CAMPAIGN_KEYS) == {"classifications_needed", "seconds_per_classification",
                                  "classifications_per_day", "start_date", "classifications"}


def test_classifications_from_a_tile_set(tmp_path):
    # The tile set's own column; an empty cell is a tile nobody classified yet.
    pd.DataFrame({"tile_id": ["t0", "t1", "t2"], "image_id": ["I"] * 3, "path": ["a.png"] * 3,
                  "classifications": ["25", "", "7"]}).to_csv(tmp_path / "tiles.csv", index=False)
    assert read_classifications(tmp_path).to_dict() == {"t0": 25, "t1": 0, "t2": 7}


@pytest.mark.parametrize("rows,match", [
    ({"tile_id": ["a", "b"], "classifications": [1, -2]}, "row 3"),
    ({"tile_id": ["a", "b"], "classifications": [1.5, 2]}, "row 2"),
    ({"tile_id": ["a", "b"], "classifications": ["x", 2]}, "not a whole number"),
    ({"tile_id": ["a", "a"], "classifications": [1, 2]}, "listed twice"),
    ({"tile": ["a"], "classifications": [1]}, "lacks column"),
])
def test_bad_classification_tables(tmp_path, rows, match):
    pd.DataFrame(rows).to_csv(tmp_path / "have.csv", index=False)
    with pytest.raises(CampaignError, match=match):
        read_classifications(tmp_path / "have.csv")
