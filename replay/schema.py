"""The one schema used by every layer: auction log, campaign table, kernel inputs.

Units: prices and budgets are in the account currency; prices are per impression
(never CPM here; reports multiply by 1000 when they show CPM). ``value`` is expected
results (clicks, conversions, ...) if the impression is won. Timestamps are UTC.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from enum import StrEnum

import numpy as np
import pyarrow as pa

#: Timestamps (``ts_us``, flight bounds) count microseconds since the epoch, UTC.
US_PER_SECOND = 1_000_000
US_PER_HOUR = 3_600 * US_PER_SECOND
US_PER_DAY = 24 * US_PER_HOUR
US_PER_WEEK = 7 * US_PER_DAY
_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)


def datetime_us(x: dt.datetime) -> int:
    """Microseconds since the epoch of a datetime (a naive one is taken as UTC), exactly."""
    if x.tzinfo is None:
        x = x.replace(tzinfo=dt.UTC)
    delta = x - _EPOCH
    return (delta.days * 86_400 + delta.seconds) * US_PER_SECOND + delta.microseconds



def to_us(value: object, what: str = "time") -> int | None:
    """Microseconds since the epoch (UTC) from a datetime, date, ISO-8601 string, numpy
    datetime64 or integer microseconds; None gives None. Naive datetimes and strings
    without an offset are taken as UTC. ``what`` names the option or field in the error."""
    from replay.errors import UsageError

    def bad() -> UsageError:
        return UsageError(f"{what} {value!r}: not a time; allowed: an ISO-8601 date or "
                          "datetime such as 2026-03-02 or 2026-03-02T06:00:00Z (UTC), a "
                          "datetime, a date or integer microseconds")

    x = value
    if x is None:
        return None
    if isinstance(x, bool):
        raise bad()
    if isinstance(x, int | np.integer):
        return int(x)
    if isinstance(x, np.datetime64):
        if np.isnat(x):
            raise bad()
        return int(x.astype("datetime64[us]").astype(np.int64))
    if isinstance(x, str):
        text = x.strip().replace(" UTC", "+00:00")
        if text.endswith("Z"):
            text = text[:-1] + "+00:00"
        try:
            x = dt.datetime.fromisoformat(text)
        except ValueError:
            raise bad() from None
    if hasattr(x, "to_pydatetime"):  # pandas-like timestamps
        x = x.to_pydatetime()
    if isinstance(x, dt.datetime):
        return datetime_us(x)
    if isinstance(x, dt.date):
        return datetime_us(dt.datetime(x.year, x.month, x.day, tzinfo=dt.UTC))
    raise bad()

FIRST_PRICE = "first_price"
SECOND_PRICE = "second_price"
PRICING_RULES: tuple[str, ...] = (FIRST_PRICE, SECOND_PRICE)

TS_UNIT = "us"
TIMESTAMP = pa.timestamp(TS_UNIT, tz="UTC")


@dataclass(frozen=True)
class Column:
    """One column of a table: name, Arrow type, unit, whether required, default."""

    name: str
    type: pa.DataType
    unit: str
    required: bool
    doc: str
    default: object = None


AUCTION_COLUMNS: tuple[Column, ...] = (
    Column("ts", TIMESTAMP, "UTC timestamp", True, "time of the auction request"),
    Column("campaign_id", pa.string(), "-", True, "campaign that could bid; never empty"),
    Column("placement", pa.string(), "-", True, "where the impression shows (feed, partner app)"),
    Column("pricing", pa.string(), "first_price | second_price", True, "auction rule"),
    Column("value", pa.float64(), "results per impression", True,
           "expected results if won (predicted click or conversion rate); >= 0"),
    Column("min_win_price", pa.float64(), "currency per impression", True,
           "lowest bid that wins (max of competing bid and reserve); a tie wins; >= 0"),
    Column("request_id", pa.string(), "-", False,
           "auction request id; (request_id, campaign_id) is unique", None),
    Column("charge_prob", pa.float64(), "probability in (0, 1]", False,
           "probability a won impression is billed (click billing); 1 = billed per impression",
           1.0),
)

CAMPAIGN_COLUMNS: tuple[Column, ...] = (
    Column("campaign_id", pa.string(), "-", True, "campaign id as in the auction log"),
    Column("budget", pa.float64(), "currency over the flight", True, "budget; > 0"),
    Column("start", TIMESTAMP, "UTC timestamp", False, "flight start (inclusive)", None),
    Column("end", TIMESTAMP, "UTC timestamp", False, "flight end (exclusive)", None),
    Column("max_cost_per_result", pa.float64(), "currency per result", False,
           "cost-per-result cap; > 0 when given", None),
    Column("group_id", pa.string(), "-", False, "campaigns with one group_id share one budget",
           None),
)

AUCTION_SCHEMA = pa.schema([pa.field(c.name, c.type, nullable=not c.required)
                            for c in AUCTION_COLUMNS])
CAMPAIGN_SCHEMA = pa.schema([pa.field(c.name, c.type, nullable=not c.required)
                             for c in CAMPAIGN_COLUMNS])
REQUIRED_AUCTION_COLUMNS = tuple(c.name for c in AUCTION_COLUMNS if c.required)
REQUIRED_CAMPAIGN_COLUMNS = tuple(c.name for c in CAMPAIGN_COLUMNS if c.required)

#: Hive partition column of the catalog (UTC date of ``ts``).
PARTITION_COLUMN = "date"
REJECT_REASON_COLUMN = "reject_reason"
REJECTED_DIR = "_rejected"


class RejectReason(StrEnum):
    """Why an auction-log row was quarantined. The first failing check wins."""

    MISSING_TS = "missing_ts"
    UNPARSEABLE_TS = "unparseable_ts"
    EMPTY_CAMPAIGN_ID = "empty_campaign_id"
    MISSING_PLACEMENT = "missing_placement"
    UNKNOWN_PRICING = "unknown_pricing"
    MISSING_VALUE = "missing_value"
    NAN_VALUE = "nan_value"
    INFINITE_VALUE = "infinite_value"
    NEGATIVE_VALUE = "negative_value"
    MISSING_MIN_WIN_PRICE = "missing_min_win_price"
    NAN_MIN_WIN_PRICE = "nan_min_win_price"
    INFINITE_MIN_WIN_PRICE = "infinite_min_win_price"
    NEGATIVE_MIN_WIN_PRICE = "negative_min_win_price"
    CHARGE_PROB_OUT_OF_RANGE = "charge_prob_out_of_range"
    DUPLICATE_REQUEST = "duplicate_request"


@dataclass(frozen=True)
class CampaignSpec:
    """One campaign's settings. Budget in currency over the flight."""

    campaign_id: str
    budget: float
    start_us: int | None = None  # flight start, microseconds since epoch UTC (inclusive)
    end_us: int | None = None  # flight end, microseconds since epoch UTC (exclusive)
    max_cost_per_result: float | None = None  # currency per result
    group_id: str | None = None


@dataclass(frozen=True)
class CampaignArrays:
    """One campaign's auctions as numpy arrays, sorted by ``ts_us`` (the kernels' input).

    All arrays have one entry per auction opportunity.
    """

    campaign_id: str
    ts_us: np.ndarray  # int64, microseconds since epoch UTC, ascending
    value: np.ndarray  # float64, results per impression
    min_win_price: np.ndarray  # float64, currency per impression
    charge_prob: np.ndarray  # float64 in (0, 1]
    placement_code: np.ndarray  # int32 index into ``placements``
    first_price: np.ndarray  # bool, True where the row sells by first price
    placements: tuple[str, ...] = field(default=())
    request_id: np.ndarray | None = None  # object (str) or None when the log has none

    def __len__(self) -> int:
        return int(self.value.shape[0])

    def slice(self, start: int, stop: int) -> CampaignArrays:
        """Rows ``start:stop`` (views, no copy)."""
        rid = None if self.request_id is None else self.request_id[start:stop]
        return CampaignArrays(
            self.campaign_id, self.ts_us[start:stop], self.value[start:stop],
            self.min_win_price[start:stop], self.charge_prob[start:stop],
            self.placement_code[start:stop], self.first_price[start:stop],
            self.placements, rid,
        )

    def window(self, start_us: int | None, end_us: int | None) -> CampaignArrays:
        """Rows with ``start_us <= ts < end_us`` (None = unbounded)."""
        lo = 0 if start_us is None else int(np.searchsorted(self.ts_us, start_us, "left"))
        hi = len(self) if end_us is None else int(np.searchsorted(self.ts_us, end_us, "left"))
        return self.slice(lo, hi)


def column_table(columns: tuple[Column, ...]) -> list[dict[str, str]]:
    """Rows describing ``columns`` (for docs and ``--help``)."""
    return [
        {"name": c.name, "type": str(c.type), "unit": c.unit,
         "required": "yes" if c.required else f"no (default {c.default!r})", "doc": c.doc}
        for c in columns
    ]
