"""The invented demo scenario and the in-memory synthetic campaign."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy import stats

from replay.catalog import Catalog
from replay.ingest import ingest
from replay.scenario import PLACEMENTS, generate_scenario, synthetic_campaign
from replay.schema import AUCTION_SCHEMA, CAMPAIGN_SCHEMA


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    folder = tmp_path_factory.mktemp("scenario")
    files = generate_scenario(folder / "s", campaigns=6, days=2, seed=3)
    return files, pq.read_table(files.auctions), pq.read_table(files.campaigns)


def test_files_and_schema(small) -> None:
    files, log, camp = small
    assert log.schema.equals(AUCTION_SCHEMA, check_metadata=False)
    assert camp.schema.equals(CAMPAIGN_SCHEMA, check_metadata=False)
    assert log.num_rows == files.rows
    # about 18,000 rows per campaign per day
    assert 0.6 * 6 * 2 * 18_000 < log.num_rows < 1.4 * 6 * 2 * 18_000
    pricing = dict(zip(log.column("placement").to_pylist()[:50_000],
                       log.column("pricing").to_pylist()[:50_000], strict=True))
    assert pricing.get("quay_home_feed") == "second_price"
    assert sum(v == "first_price" for v in pricing.values()) >= 2
    assert camp.num_rows == 6 and min(camp.column("budget").to_pylist()) > 0


def test_interleaved_cycle_and_heavy_tails(small) -> None:
    _, log, _ = small
    ts = log.column("ts").cast("int64").to_numpy()
    assert np.all(np.diff(ts) >= 0)  # sorted by time
    plc = np.array(log.column("placement").to_pylist())
    assert np.mean(plc[1:] != plc[:-1]) > 0.3  # placements interleave in time
    hours = (ts // 3_600_000_000) % 24
    counts = np.bincount(hours, minlength=24)
    assert counts.max() > 2.5 * counts.min()  # daily traffic cycle (1.65 / 0.35 by design)
    # Competing prices are log-normal: for the feed, quantiles of log price above the
    # reserve follow a normal with sd sqrt(0.45^2 + 0.8^2 + 0.12^2) (construction in
    # scenario.py); check the shape with scipy.stats against the lognormal's quantiles.
    # Source: scipy.stats.lognorm; quantile ratio q99/q50 = exp(z_0.99 * sd).
    price = log.column("min_win_price").to_numpy()
    feed = (plc == "quay_home_feed") & (price > 0)
    sd = np.sqrt(0.45**2 + 0.8**2 + 0.12**2)
    q50, q99 = np.quantile(price[feed], [0.5, 0.99])
    assert q50 == pytest.approx(PLACEMENTS[0][2], rel=0.1)
    assert q99 / q50 == pytest.approx(stats.lognorm(sd).ppf(0.99), rel=0.15)
    assert stats.kurtosis(price[feed]) > 10  # heavy right tail (normal: 0)


def test_billing_groups_and_budgets(small) -> None:
    _, log, camp = small
    cid = np.array(log.column("campaign_id").to_pylist())
    charge = log.column("charge_prob").to_numpy()
    click = {c for c in np.unique(cid) if np.median(charge[cid == c]) < 1}
    assert click and len(click) < 6  # some click-billed, some impression-billed
    groups = dict(zip(camp.column("campaign_id").to_pylist(),
                      camp.column("group_id").to_pylist(), strict=True))
    members = [c for c, g in groups.items() if g is not None]
    assert len(members) >= 2
    rid = np.array(log.column("request_id").to_pylist())
    shared = set(rid[cid == members[0]]) & set(rid[cid == members[1]])
    assert len(shared) > 100  # group mates compete for the same requests
    assert any(c is not None for c in camp.column("max_cost_per_result").to_pylist())
    # Budgets bind: each is well below the cost of every impression at its price.
    price = log.column("min_win_price").to_numpy()
    for c, b in zip(camp.column("campaign_id").to_pylist(), camp.column("budget").to_pylist(),
                    strict=True):
        mine = (cid == c) & np.isfinite(price) & (price > 0)
        assert b < 0.8 * price[mine].sum()


def test_deterministic(tmp_path: Path) -> None:
    a = generate_scenario(tmp_path / "a", campaigns=2, days=1, seed=5)
    b = generate_scenario(tmp_path / "b", campaigns=2, days=1, seed=5)
    c = generate_scenario(tmp_path / "c", campaigns=2, days=1, seed=6)
    # (bytes, not Table.equals: the planted NaN values never compare equal)
    for name in ("auctions", "campaigns_csv"):
        digest = [hashlib.sha256(getattr(f, name).read_bytes()).hexdigest() for f in (a, b, c)]
        assert digest[0] == digest[1] != digest[2], name


def test_ingest_quarantines_the_planted_rows(small, tmp_path: Path) -> None:
    files, log, _ = small
    report = ingest([files.auctions], tmp_path / "cat", campaigns=files.campaigns)
    n = files.bad_rows
    # Planted defects cycle over five kinds (scenario._break_rows): kind k gets
    # ceil((n - k) / 5) rows.
    per_kind = [-(-(n - k) // 5) for k in range(5)]
    assert report.rejected == {
        "unknown_pricing": per_kind[2], "nan_value": per_kind[0],
        "negative_min_win_price": per_kind[1], "charge_prob_out_of_range": per_kind[3],
        "duplicate_request": per_kind[4]}
    assert report.rows_read == log.num_rows == report.accepted + n
    assert report.warnings == []
    assert Catalog(tmp_path / "cat").campaign_ids() == sorted(set(
        log.column("campaign_id").to_pylist()))


def test_synthetic_campaign() -> None:
    arr = synthetic_campaign(200_000, seed=4, days=3.0, first_price_share=0.3)
    assert len(arr) == 200_000
    assert arr.ts_us.dtype == np.int64 and np.all(np.diff(arr.ts_us) >= 0)
    span = (arr.ts_us[-1] - arr.ts_us[0]) / 86_400e6
    assert 2.9 < span <= 3.0
    assert arr.value.dtype == np.float64 and np.all(arr.value > 0)
    assert np.all(arr.min_win_price > 0) and np.all(arr.charge_prob == 1)
    assert np.array_equal(arr.first_price, arr.placement_code != 0)
    assert arr.placements[0] == "feed"
    # share of first-price rows ~ Binomial(n, 0.3). Source: scipy.stats.binomtest
    k = int(arr.first_price.sum())
    assert stats.binomtest(k, len(arr), 0.3).pvalue > 1e-4
    same = synthetic_campaign(1000, seed=4)
    again = synthetic_campaign(1000, seed=4)
    assert np.array_equal(same.value, again.value) and len(synthetic_campaign(0)) == 0
