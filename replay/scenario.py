"""Invented demo data: the "Maple Quay Market" scenario and fast synthetic campaigns.

Maple Quay Market is a made-up marketplace. It sells its own feed placement by second price
and three partner placements (invented apps) by first price. Campaigns of invented
advertisers differ in budget, value per impression, cost-per-result cap and billing (some pay
per click: ``charge_prob`` = predicted click rate). Traffic follows a daily cycle; competing
prices are log-normal (heavy-tailed) and correlated with impression quality. Budgets are a
fraction (20-80 %) of what buying every profitable impression would cost, so they bind and
pacing matters. A few campaigns share one budget through ``group_id`` and compete for the
same requests (shared ``request_id``).

Units as everywhere: prices in currency per impression, values in expected results per
impression, budgets in currency over the flight.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from replay.schema import (
    AUCTION_SCHEMA,
    CAMPAIGN_SCHEMA,
    FIRST_PRICE,
    SECOND_PRICE,
    US_PER_DAY,
    CampaignArrays,
)

MARKET_NAME = "Maple Quay Market"
#: Scenario start (a Monday), UTC.
SCENARIO_START = dt.datetime(2026, 3, 2, tzinfo=dt.UTC)

#: (placement, pricing, median competing price per impression, log-sd, reserve price,
#:  value multiplier, share of requests)
PLACEMENTS: tuple[tuple[str, str, float, float, float, float, float], ...] = (
    ("quay_home_feed", SECOND_PRICE, 0.0020, 0.80, 0.0003, 1.15, 0.40),
    ("partner_crossword_app", FIRST_PRICE, 0.0012, 0.95, 0.0002, 0.85, 0.25),
    ("partner_tide_tables", FIRST_PRICE, 0.0009, 1.05, 0.0001, 0.75, 0.20),
    ("partner_recipe_box", FIRST_PRICE, 0.0015, 0.90, 0.0002, 0.95, 0.15),
)

_ADVERTISERS = (
    "garden_seeds", "river_shoes", "tidy_home", "quiet_reads", "trail_gear", "bright_paint",
    "corner_bakes", "snug_socks", "pine_desks", "salt_snacks", "lamp_makers", "kite_club",
    "clay_pots", "harbor_tours", "owl_lessons", "velvet_beds",
)

#: Expected rows per campaign per day (the default 12 x 7 gives about 1.5 million rows).
ROWS_PER_CAMPAIGN_DAY = 18_000


@dataclass(frozen=True)
class ScenarioFiles:
    """Paths written by :func:`generate_scenario`."""

    out_dir: Path
    auctions: Path  # Parquet auction log (AUCTION_SCHEMA), sorted by ts
    campaigns: Path  # Parquet campaign table (CAMPAIGN_SCHEMA)
    campaigns_csv: Path  # the same campaign table as CSV (easy to read)
    rows: int
    bad_rows: int  # rows deliberately broken to show the quarantine


def _daily_cdf(days: float, step_s: float = 60.0) -> tuple[np.ndarray, np.ndarray]:
    """Grid of seconds since start and the CDF of a daily traffic cycle over it.

    Intensity peaks in the evening (20:00 UTC) and bottoms out before dawn; weekends carry
    15 % more traffic. Shape is illustrative (common practice for consumer apps).
    """
    t = np.arange(0.0, days * 86_400.0 + step_s, step_s)
    hour = (t / 3600.0) % 24.0
    weekday = (t // 86_400.0 + SCENARIO_START.weekday()) % 7
    intensity = (1.0 + 0.65 * np.cos(2 * np.pi * (hour - 20.0) / 24.0)) \
        * np.where(weekday >= 5, 1.15, 1.0)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (intensity[1:] + intensity[:-1]))])
    return t, cdf / cdf[-1]


def _sorted_uniforms(rng: np.random.Generator, n: int) -> np.ndarray:
    """n sorted U(0,1) draws in O(n): normalized partial sums of exponentials."""
    gaps = rng.standard_exponential(n + 1)
    c = np.cumsum(gaps)
    return c[:-1] / c[-1]


def _times_us(rng: np.random.Generator, n: int, days: float, start_us: int) -> np.ndarray:
    grid, cdf = _daily_cdf(days)
    sec = np.interp(_sorted_uniforms(rng, n), cdf, grid)
    return start_us + (sec * 1e6).astype(np.int64)


def _hindsight_threshold(value: np.ndarray, price: np.ndarray, budget: float) -> float:
    """Cost per result of the budget-only hindsight optimum (greedy by value/price)."""
    order = np.argsort(-(value / np.maximum(price, 1e-12)), kind="stable")
    spend = np.cumsum(price[order])
    k = int(np.searchsorted(spend, budget, "right"))
    k = max(k, 1)
    results = float(value[order[:k]].sum())
    return float(spend[k - 1] / max(results, 1e-12))


def generate_scenario(out_dir: str | Path, campaigns: int = 12, days: int = 7,
                      seed: int = 7, bad_row_share: float = 5e-5) -> ScenarioFiles:
    """Write the invented marketplace's auction log and campaign table to ``out_dir``.

    ``campaigns`` x ``days`` x about 18,000 rows; ``bad_row_share`` of them (at least 8 when
    > 0) are deliberately broken (NaN value, negative price, unknown pricing, bad
    charge_prob, duplicate request) so ingestion has something to quarantine.
    """
    if campaigns < 1 or days < 1:
        raise ValueError("campaigns and days must be >= 1")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    start_us = int(SCENARIO_START.timestamp()) * 1_000_000
    C = campaigns

    # Campaigns: kind, base value, worth per result, participation per placement.
    click = rng.random(C) < 0.4
    click[0] = True
    if C > 1:
        click[1] = False
    base_value = np.where(click, rng.lognormal(np.log(0.012), 0.35, C),
                          rng.lognormal(np.log(0.0025), 0.4, C))
    worth = np.where(click, rng.uniform(0.18, 0.45, C), rng.uniform(0.9, 2.4, C))
    scale = rng.uniform(0.5, 1.5, C)  # relative traffic per campaign
    reach = rng.uniform(0.4, 1.0, (C, len(PLACEMENTS)))  # targeting per placement
    reach[:, 0] = np.maximum(reach[:, 0], 0.7)
    group = np.full(C, None, dtype=object)
    if C >= 6:
        group[0:3] = "grp_spring_push"
    if C >= 10:
        group[6:8] = "grp_home_refresh"
    names = [f"c{i + 1:02d}_{_ADVERTISERS[i % len(_ADVERTISERS)]}" for i in range(C)]

    # Requests per placement; each campaign bids on a random share of them.
    share = np.array([p[6] for p in PLACEMENTS])
    rows_target = ROWS_PER_CAMPAIGN_DAY * days * scale  # per campaign
    q = 0.3  # mean probability that a campaign is eligible for a request
    n_req = np.maximum((rows_target.sum() / C / q * share * 1.0).astype(np.int64), 10)
    parts: dict[str, list[np.ndarray]] = {k: [] for k in (
        "ts", "cid", "plc", "value", "price", "rid", "charge")}
    req_offset = 0
    for p_idx, (_name, _pricing, median, sd, reserve, vmult, _sh) in enumerate(PLACEMENTS):
        n = int(n_req[p_idx])
        ts = _times_us(rng, n, days, start_us)
        quality = rng.standard_normal(n)  # better impressions: more value and more competition
        competing = median * np.exp(0.45 * quality + sd * rng.standard_normal(n))
        for c in range(C):
            prob = min(1.0, q * scale[c] * reach[c, p_idx] / reach[:, p_idx].mean())
            take = np.flatnonzero(rng.random(n) < prob)
            m = take.size
            noise = rng.standard_normal(m)
            v = base_value[c] * vmult * np.exp(0.35 * quality[take] + 0.5 * noise
                                               - 0.5 * (0.35**2 + 0.5**2))
            v = np.minimum(v, 0.95)
            # Each campaign sees a slightly different winning price (ad quality scores).
            price = np.maximum(competing[take] * np.exp(0.12 * rng.standard_normal(m)), reserve)
            parts["ts"].append(ts[take])
            parts["cid"].append(np.full(m, c, dtype=np.int32))
            parts["plc"].append(np.full(m, p_idx, dtype=np.int32))
            parts["value"].append(v)
            parts["price"].append(price)
            parts["rid"].append(req_offset + take.astype(np.int64))
            parts["charge"].append(np.clip(v, 1e-4, 1.0) if click[c] else np.ones(m))
        req_offset += n
    cols = {k: np.concatenate(v) for k, v in parts.items()}
    order = np.argsort(cols["ts"], kind="stable")  # interleave placements and campaigns
    cols = {k: v[order] for k, v in cols.items()}
    n_rows = int(order.size)

    # Budgets: 20-80 % of buying every profitable impression at its minimum winning price.
    budgets = np.zeros(C)
    caps: list[float | None] = [None] * C
    for c in range(C):
        mine = cols["cid"] == c
        v, price = cols["value"][mine], cols["price"][mine]
        profitable = v * worth[c] >= price
        cost_all = float(price[profitable].sum()) if profitable.any() else float(price.sum())
        budgets[c] = round(rng.uniform(0.2, 0.8) * cost_all, 2)
        if c % 3 == 2:  # every third campaign also has a cost-per-result cap, often binding
            cpr = _hindsight_threshold(v, price, budgets[c])
            caps[c] = round(cpr * rng.uniform(0.7, 1.1), 4)
    budgets = np.maximum(budgets, 1.0)

    table = _auction_table(cols, names)
    table, n_bad = _break_rows(table, rng, bad_row_share)
    auctions_path = out / "auctions.parquet"
    pq.write_table(table, auctions_path, compression="zstd")

    end_us = start_us + days * US_PER_DAY
    campaign_table = pa.Table.from_arrays([
        pa.array(names, pa.string()),
        pa.array(budgets, pa.float64()),
        pa.array([start_us] * C, pa.int64()).cast(CAMPAIGN_SCHEMA.field("start").type),
        pa.array([end_us] * C, pa.int64()).cast(CAMPAIGN_SCHEMA.field("end").type),
        pa.array(caps, pa.float64()),
        pa.array(list(group), pa.string()),
    ], schema=CAMPAIGN_SCHEMA)
    campaigns_path = out / "campaigns.parquet"
    pq.write_table(campaign_table, campaigns_path)
    campaigns_csv = out / "campaigns.csv"
    pacsv.write_csv(campaign_table, campaigns_csv)
    return ScenarioFiles(out, auctions_path, campaigns_path, campaigns_csv, n_rows + n_bad,
                         n_bad)


def _auction_table(cols: dict[str, np.ndarray], names: list[str]) -> pa.Table:
    placements = pa.array([p[0] for p in PLACEMENTS], pa.string())
    pricing = pa.array([p[1] for p in PLACEMENTS], pa.string())
    plc = pa.array(cols["plc"])
    rid = pc.binary_join_element_wise(
        "mq-", pc.utf8_lpad(pc.cast(pa.array(cols["rid"]), pa.string()), 9, "0"), "")
    return pa.Table.from_arrays([
        pa.array(cols["ts"]).cast(AUCTION_SCHEMA.field("ts").type),
        pc.take(pa.array(names, pa.string()), pa.array(cols["cid"])),
        pc.take(placements, plc),
        pc.take(pricing, plc),
        pa.array(cols["value"]),
        pa.array(cols["price"]),
        rid,
        pa.array(cols["charge"]),
    ], schema=AUCTION_SCHEMA)


def _break_rows(table: pa.Table, rng: np.random.Generator,
                share: float) -> tuple[pa.Table, int]:
    """Append copies of random rows with one defect each (cycled over five kinds)."""
    if share <= 0:
        return table, 0
    n_bad = max(8, int(table.num_rows * share))
    idx = np.sort(rng.choice(table.num_rows, n_bad, replace=False))
    bad = table.take(pa.array(idx)).to_pydict()
    for j in range(n_bad):
        kind = j % 5
        if kind == 0:
            bad["value"][j] = float("nan")
        elif kind == 1:
            bad["min_win_price"][j] = -abs(bad["min_win_price"][j]) - 0.001
        elif kind == 2:
            bad["pricing"][j] = "third_price"
        elif kind == 3:
            bad["charge_prob"][j] = 1.5
        # kind 4: an exact copy, so a duplicate (request_id, campaign_id)
    bad_table = pa.Table.from_pydict(bad, schema=AUCTION_SCHEMA)
    merged = pa.concat_tables([table, bad_table])
    order = pc.sort_indices(merged, [("ts", "ascending")])
    return merged.take(order), n_bad


def synthetic_campaign(n_rows: int, seed: int = 0, days: float = 7.0,
                       first_price_share: float = 0.5,
                       campaign_id: str = "synthetic") -> CampaignArrays:
    """One in-memory campaign for benchmarks and tests (vectorized; ~1 s per 10M rows).

    Placements (sorted, codes index them): ``feed`` (second price), ``partner_a`` and
    ``partner_b`` (first price, ``first_price_share`` of the rows together). Values are
    log-normal around 0.01 results per impression; minimum winning prices log-normal around
    0.002 currency per impression, correlated with value; ``charge_prob`` is 1.
    """
    if n_rows < 0:
        raise ValueError("n_rows must be >= 0")
    rng = np.random.default_rng(seed)
    start_us = int(SCENARIO_START.timestamp()) * 1_000_000
    ts = _times_us(rng, n_rows, days, start_us) if n_rows else np.zeros(0, np.int64)
    u = rng.random(n_rows)
    first_price = u < first_price_share
    # first price rows split evenly between the two partners
    code = np.where(first_price, np.where(u < 0.5 * first_price_share, 1, 2), 0).astype(np.int32)
    quality = rng.standard_normal(n_rows)
    value = 0.01 * np.exp(0.4 * quality + 0.5 * rng.standard_normal(n_rows) - 0.205)
    price = 0.002 * np.exp(0.5 * quality + 0.8 * rng.standard_normal(n_rows))
    return CampaignArrays(
        campaign_id=campaign_id, ts_us=ts, value=value, min_win_price=price,
        charge_prob=np.ones(n_rows), placement_code=code, first_price=first_price,
        placements=("feed", "partner_a", "partner_b"), request_id=None,
    )


__all__ = ["ScenarioFiles", "generate_scenario", "synthetic_campaign", "PLACEMENTS",
           "MARKET_NAME"]


def write_sample_data(data_dir: str | Path, n_rows: int = 3000, seed: int = 11) -> dict:
    """Write the small sample shipped in ``data/`` (same rows as Parquet and CSV).

    A uniform subsample of a 4-campaign, 2-day scenario; budgets are scaled by the sampling
    fraction so they still bind. Keeps the scenario's deliberately broken rows that fall
    in the sample plus at least 8, so ``replay ingest`` shows its quarantine.
    """
    import tempfile

    data = Path(data_dir)
    data.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        files = generate_scenario(tmp, campaigns=4, days=2, seed=seed, bad_row_share=0.0)
        log = pq.read_table(files.auctions)
        camp = pq.read_table(files.campaigns)
    rng = np.random.default_rng(seed)
    frac = min(1.0, n_rows / log.num_rows)
    keep = np.sort(rng.choice(log.num_rows, min(n_rows, log.num_rows), replace=False))
    sample = log.take(pa.array(keep))
    sample, n_bad = _break_rows(sample, rng, 5.0 / max(sample.num_rows, 1))
    budget = pc.round(pc.multiply(camp.column("budget"), frac), 4)
    camp = camp.set_column(camp.column_names.index("budget"), "budget", budget)
    pq.write_table(sample, data / "sample_auctions.parquet")
    pacsv.write_csv(sample, data / "sample_auctions.csv")
    pq.write_table(camp, data / "sample_campaigns.parquet")
    pacsv.write_csv(camp, data / "sample_campaigns.csv")
    return {"rows": sample.num_rows, "bad_rows": n_bad, "campaigns": camp.num_rows}
