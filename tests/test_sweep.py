"""Sweeps: grid expansion, the ranking table, and a sweep equal to separate single runs."""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from replay.analysis.sweep import expand_grid, rank_settings, settings_table
from replay.catalog import Catalog
from replay.engines.local import backtest
from replay.engines.windows import normalize_sweep, parse_sweep
from replay.errors import UsageError
from replay.ingest import ingest
from replay.rules.registry import get_rule
from replay.scenario import generate_scenario


def build_catalog(root: Path, campaigns: int = 3, days: int = 2, keep: float = 0.2,
                  seed: int = 5) -> Catalog:
    """A tiny catalog of the invented scenario: every 1/keep-th row kept."""
    files = generate_scenario(root / "scenario", campaigns=campaigns, days=days, seed=seed)
    log = pl.read_parquet(files.auctions)
    step = int(round(1 / keep))
    log.with_row_index("_i").filter(pl.col("_i") % step == 0).drop("_i") \
        .write_parquet(root / "small.parquet")
    ingest([root / "small.parquet"], root / "catalog", campaigns=files.campaigns)
    return Catalog(root / "catalog")


@given(st.lists(st.integers(1, 4), min_size=1, max_size=3))
@settings(max_examples=30, deadline=None)
def test_grid_is_the_cartesian_product(sizes: list[int]) -> None:
    axes = {f"k{i}": [f"v{i}_{j}" for j in range(n)] for i, n in enumerate(sizes)}
    grid = expand_grid(axes, params={"base": 1}, every="15min", every_n=None,
                       charges="expected")
    # Reference: itertools.product, last axis fastest.
    expected = list(itertools.product(*axes.values()))
    assert [tuple(s.axes.values()) for s in grid] == expected
    assert [s.setting_id for s in grid] == list(range(len(expected)))
    assert all(s.params["base"] == 1 for s in grid)


def test_schedule_axes_replace_the_base_schedule() -> None:
    grid = expand_grid({"every_n": [100, 1000]}, params={}, every="15min", every_n=None,
                       charges="expected")
    assert [(s.every, s.every_n) for s in grid] == [(None, 100), (None, 1000)]
    table = settings_table(grid)
    assert table["every_n"].to_list() == [100, 1000]
    assert json.loads(table["params"][0]) == {}


def test_sweep_parsing_types_and_errors() -> None:
    rule = get_rule("dual-mirror")
    axes = parse_sweep(["step=0.05,0.1,0.2", "every=5min,15min,60min"], rule)
    assert axes == {"step": [0.05, 0.1, 0.2], "every": ["5min", "15min", "60min"]}
    with pytest.raises(UsageError, match="unknown key.*allowed: .*step"):
        parse_sweep(["stepp=1,2"], rule)
    with pytest.raises(UsageError, match="missing unit"):
        parse_sweep(["every=15"], rule)
    with pytest.raises(UsageError, match="step"):
        parse_sweep(["step=-1"], rule)
    with pytest.raises(UsageError, match="exclude each other"):
        normalize_sweep({"every": ["1h"], "every_n": [10]}, rule)


def test_ranking_statistics_against_numpy() -> None:
    rng = np.random.default_rng(4)
    rows = []
    for sid in range(3):
        for c in range(7):
            rows.append({"setting_id": sid, "campaign_id": f"c{c}",
                         "relative_regret": float(rng.random() * (sid + 1)),
                         "regret": 1.0, "results": 2.0, "spend": 3.0, "budget_used": 0.5})
    totals = pl.DataFrame(rows).with_columns(pl.col("setting_id").cast(pl.Int32))
    rank = rank_settings(totals)
    assert rank.height == 3
    assert rank["mean_relative_regret"].is_sorted()
    for r in rank.iter_rows(named=True):
        x = totals.filter(pl.col("setting_id") == r["setting_id"])["relative_regret"].to_numpy()
        # Source: numpy mean, sample std (ddof=1) and linear-interpolation percentiles.
        assert r["mean_relative_regret"] == pytest.approx(np.mean(x))
        assert r["std_relative_regret"] == pytest.approx(np.std(x, ddof=1))
        assert r["p10_relative_regret"] == pytest.approx(np.percentile(x, 10))
        assert r["p90_relative_regret"] == pytest.approx(np.percentile(x, 90))
        assert r["campaigns"] == 7
    assert rank["rank"].to_list() == [1, 2, 3]


@pytest.fixture(scope="module")
def cat(tmp_path_factory):
    return build_catalog(tmp_path_factory.mktemp("sweep"), campaigns=3, keep=0.2)


def test_sweep_equals_separate_runs_and_ranks(cat, tmp_path: Path) -> None:
    res = backtest(cat, "dual-mirror", out=tmp_path / "sweep", workers=1,
                   sweep={"step": [0.05, 0.2], "every": ["15min", "1h"]})
    n_camp = len(res.manifest["campaigns"])
    assert res.totals.height == 4 * n_camp
    assert res.settings.height == 4
    assert res.settings.columns[:4] == ["setting_id", "label", "step", "every"]
    rank = res.ranking()
    assert rank.height == 4 and rank["mean_relative_regret"].is_sorted()
    assert set(rank.columns) >= {"rank", "setting_id", "label", "mean_relative_regret",
                                 "std_relative_regret", "p10_relative_regret",
                                 "p90_relative_regret"}
    # Grid point 3 is (step=0.2, every=1h): the shared load and solve change nothing.
    single = backtest(cat, "dual-mirror", {"step": 0.2}, every="1h", workers=1)
    a = res.totals.filter(pl.col("setting_id") == 3).drop("setting_id")
    b = single.totals.drop("setting_id")
    assert a.equals(b)
    sa = res.series.filter(pl.col("setting_id") == 3).drop("setting_id")
    assert sa.equals(single.series.drop("setting_id"))
