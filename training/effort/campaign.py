"""The state of a volunteer marking campaign: what each tile still needs, in classifications, hours and days.

A campaign is described by a small file of our own (JSON or TOML, see README,
"Campaign file") or by the equivalent options of ``frostvane effort``:

``classifications_needed``
    Classifications a tile needs before its consensus counts as final.
    Default :data:`DEFAULT_CLASSIFICATIONS_NEEDED`.
``seconds_per_classification``
    Volunteer time per classification, s. Default
    :data:`DEFAULT_SECONDS_PER_CLASSIFICATION`, reported as an assumption.
``classifications_per_day``
    Optional volunteer throughput; with it the effort left is also a date range.
``start_date``
    Optional ISO date (``YYYY-MM-DD``) from which the days are counted; default
    the day of the run.
``classifications``
    Optional path (relative to the campaign file) of what each tile already
    has: a tile-set folder (its ``tiles.csv`` ``classifications`` column) or a
    CSV ``tile_id,classifications``. Tiles it does not list have none yet.

Effort left on a tile is ``max(needed - have, 0)``.
"""

import datetime as _dt
import json
import math
from dataclasses import dataclass, field, fields
from pathlib import Path

import numpy as np
import pandas as pd

from detector.errors import DetectorError

__all__ = [
    "CampaignError",
    "Campaign",
    "DEFAULT_CLASSIFICATIONS_NEEDED",
    "DEFAULT_SECONDS_PER_CLASSIFICATION",
    "CAMPAIGN_KEYS",
    "read_campaign",
    "campaign_with_overrides",
    "read_classifications",
    "remaining_classifications",
    "days_for",
    "date_range",
]

#: Classifications after which a tile's consensus counts as final. Common practice (value from
#: memory): volunteer marking projects of this kind retire a tile after about 20-30
#: classifications; we take the upper end so that the effort left is not understated.
DEFAULT_CLASSIFICATIONS_NEEDED = 30

#: Assumed volunteer time per classification, s, when the campaign gives none (reported as assumed).
DEFAULT_SECONDS_PER_CLASSIFICATION = 60.0

#: Keys of the campaign file, the single source of truth for the reader and the docs.
CAMPAIGN_KEYS = ("classifications_needed", "seconds_per_classification", "classifications_per_day",
                 "start_date", "classifications")


class CampaignError(DetectorError, ValueError):
    """A campaign file, option or classifications table is invalid."""


@dataclass(frozen=True)
class Campaign:
    """What a campaign needs per tile, how fast its volunteers work, and what they already did.

    Attributes
    ----------
    classifications_needed : int, default=30
        Classifications a tile needs before its consensus counts as final, >= 1.
    seconds_per_classification : float, optional
        Volunteer time per classification, s, > 0; None means the assumed
        :data:`DEFAULT_SECONDS_PER_CLASSIFICATION`.
    classifications_per_day : float, optional
        Volunteer throughput, > 0; gives the effort left as days and dates.
    start_date : datetime.date, optional
        Day the remaining work starts; default the day of the run.
    classifications : path-like, optional
        Tile-set folder or CSV ``tile_id,classifications`` of what tiles already have.
    """

    classifications_needed: int = DEFAULT_CLASSIFICATIONS_NEEDED
    seconds_per_classification: float = None
    classifications_per_day: float = None
    start_date: _dt.date = None
    classifications: Path = None
    source: str = field(default="defaults", compare=False)

    def __post_init__(self):
        need = self.classifications_needed
        if isinstance(need, bool) or not isinstance(need, (int, np.integer)) or need < 1:
            raise CampaignError(f"classifications_needed must be a whole number >= 1; got {need!r}.")
        for name in ("seconds_per_classification", "classifications_per_day"):
            value = getattr(self, name)
            if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))
                                      or not math.isfinite(value) or value <= 0):
                raise CampaignError(f"{name} must be a positive number; got {value!r}.")
        if self.start_date is not None and not isinstance(self.start_date, _dt.date):
            raise CampaignError(f"start_date must be a date; got {self.start_date!r}.")

    @property
    def seconds(self):
        """Seconds per classification used in the arithmetic (the default when none was given)."""
        return DEFAULT_SECONDS_PER_CLASSIFICATION if self.seconds_per_classification is None \
            else float(self.seconds_per_classification)

    @property
    def seconds_assumed(self):
        return self.seconds_per_classification is None

    def replace(self, **changes):
        """A copy with the given fields changed (None values are ignored)."""
        values = {f.name: getattr(self, f.name) for f in fields(self)}
        values.update({k: v for k, v in changes.items() if v is not None})
        return Campaign(**values)

    def describe(self):
        """JSON-ready description, with the defaults said to be defaults."""
        return {
            "classifications_needed": int(self.classifications_needed),
            "seconds_per_classification": self.seconds,
            "seconds_assumed": self.seconds_assumed,
            "classifications_per_day": self.classifications_per_day,
            "start_date": None if self.start_date is None else self.start_date.isoformat(),
            "classifications_from": None if self.classifications is None else str(self.classifications),
            "source": self.source,
        }


def campaign_with_overrides(path=None, **overrides):
    """The campaign of ``path`` (or the defaults) with some of its keys overridden.

    Parameters
    ----------
    path : path-like, optional
        Campaign file (.json or .toml, see :func:`read_campaign`).
    **overrides
        Campaign fields; None values leave the file's (or the default) value.

    Returns
    -------
    campaign : Campaign
    """
    base = read_campaign(path) if path is not None else Campaign()
    return base.replace(**overrides)


def _parse_date(value, where):
    if isinstance(value, _dt.datetime):
        return value.date()
    if isinstance(value, _dt.date):
        return value
    try:
        return _dt.date.fromisoformat(str(value))
    except ValueError as err:
        raise CampaignError(f"{where}: start_date {value!r} is not an ISO date (YYYY-MM-DD).") from err


def read_campaign(path):
    """Read a campaign file (``.json`` or ``.toml``).

    Parameters
    ----------
    path : path-like
        The file; keys are :data:`CAMPAIGN_KEYS`, all optional. A relative
        ``classifications`` path is taken from the file's folder.

    Returns
    -------
    campaign : Campaign

    Raises
    ------
    CampaignError
        Missing or unreadable file, unknown key, or a bad value.
    """
    path = Path(path)
    if not path.is_file():
        raise CampaignError(f"campaign file {str(path)!r} does not exist.")
    suffix = path.suffix.lower()
    try:
        if suffix == ".json":
            raw = json.loads(path.read_text(encoding="utf-8"))
        elif suffix == ".toml":
            import tomllib

            raw = tomllib.loads(path.read_text(encoding="utf-8"))
        else:
            raise CampaignError(f"campaign file {str(path)!r} must end in .json or .toml; got {suffix!r}.")
    except (json.JSONDecodeError, UnicodeDecodeError, ValueError) as err:
        if isinstance(err, CampaignError):
            raise
        raise CampaignError(f"campaign file {str(path)!r} cannot be read: {err}.") from err
    if not isinstance(raw, dict):
        raise CampaignError(f"campaign file {str(path)!r} must hold a table of keys; got {type(raw).__name__}.")
    unknown = sorted(set(raw) - set(CAMPAIGN_KEYS))
    if unknown:
        raise CampaignError(f"campaign file {str(path)!r} has unknown key(s) {unknown!r} "
                            f"(valid: {', '.join(CAMPAIGN_KEYS)}).")
    values = dict(raw)
    if "start_date" in values:
        values["start_date"] = _parse_date(values["start_date"], str(path))
    if "classifications" in values:
        source = Path(str(values["classifications"]))
        values["classifications"] = source if source.is_absolute() else path.parent / source
    try:
        return Campaign(**values, source=str(path))
    except CampaignError as err:
        raise CampaignError(f"campaign file {str(path)!r}: {err}") from err


def read_classifications(source):
    """Classifications each tile already has.

    Parameters
    ----------
    source : path-like
        A tile-set folder (its ``tiles.csv`` needs the ``classifications``
        column) or a CSV with columns ``tile_id`` and ``classifications``.

    Returns
    -------
    have : Series of int64 indexed by tile_id

    Raises
    ------
    CampaignError
        Missing file or column, duplicated tile_id, or a value that is not a whole number >= 0.
    """
    source = Path(source)
    path = source / "tiles.csv" if source.is_dir() else source
    if not path.is_file():
        raise CampaignError(f"classifications file {str(path)!r} does not exist.")
    try:
        table = pd.read_csv(path, dtype={"tile_id": str}, keep_default_na=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
        raise CampaignError(f"{str(path)!r} cannot be read as CSV: {err}.") from err
    missing = [c for c in ("tile_id", "classifications") if c not in table.columns]
    if missing:
        raise CampaignError(f"{str(path)!r} lacks column(s) {missing!r} (found: {', '.join(map(str, table.columns))}).")
    values = pd.to_numeric(table["classifications"].replace("", np.nan), errors="coerce")
    # A tile set may leave the column empty for tiles nobody classified yet.
    values = values.where(table["classifications"].astype(str).str.strip() != "", 0.0)
    bad = ~np.isfinite(values) | (values < 0) | (values != np.floor(values))
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise CampaignError(f"{str(path)!r} row {row + 2}: classifications {table['classifications'].iloc[row]!r} "
                            f"is not a whole number >= 0.")
    ids = table["tile_id"].astype(str)
    dup = ids.duplicated()
    if dup.any():
        row = int(np.flatnonzero(dup.to_numpy())[0])
        raise CampaignError(f"{str(path)!r} row {row + 2}: tile_id {ids.iloc[row]!r} is listed twice.")
    return pd.Series(values.to_numpy(np.int64), index=pd.Index(ids, name="tile_id"), name="classifications")


def remaining_classifications(have, needed):
    """Classifications a tile still needs: ``max(needed - have, 0)``, elementwise.

    Parameters
    ----------
    have : array-like of int
        Classifications each tile already has (>= 0).
    needed : int
        Classifications a tile needs before its consensus counts as final.

    Returns
    -------
    remaining : ndarray of int64
    """
    have = np.asarray(have, dtype=np.int64)
    return np.maximum(int(needed) - have, 0)


def days_for(classifications, per_day):
    """Days of volunteer work at ``per_day`` classifications a day (fractional; None without throughput)."""
    if per_day is None:
        return None
    return float(classifications) / float(per_day)


def date_range(days_low, days_high, start):
    """Calendar dates by which the work is done, for a low and a high day count.

    Whole days are counted up: work of 0.2 days started on a date ends that
    date's next day at the latest, so the end date is ``start + ceil(days)``.

    Returns
    -------
    dates : tuple of str
        ISO dates (low, high).
    """
    start = _dt.date.today() if start is None else start
    return tuple((start + _dt.timedelta(days=math.ceil(d))).isoformat() for d in (days_low, days_high))
