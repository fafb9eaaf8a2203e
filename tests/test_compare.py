"""Paired comparison of two runs: intervals, verdicts, refusals, empty runs."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import scipy.stats

from replay.analysis.compare import (
    BETTER,
    NO_DIFFERENCE,
    WORSE,
    bootstrap_mean,
    compare,
)
from replay.errors import ReplayError, UsageError

EVIL_ID = "</script><script>alert(1)</script>"
FINGERPRINT = "f" * 16
WINDOW = {"start": "2026-03-02T00:00:00+00:00", "end": "2026-03-05T00:00:00+00:00",
          "train_start": "2026-03-01T00:00:00+00:00", "train_end": "2026-03-02T00:00:00+00:00"}


@dataclass
class MemRun:
    """A run as the run store hands it out (manifest + totals), built in memory."""

    manifest: dict
    totals: pl.DataFrame
    path: str = "mem"
    series: pl.DataFrame = field(default_factory=pl.DataFrame)
    placements: pl.DataFrame = field(default_factory=pl.DataFrame)
    settings: pl.DataFrame = field(default_factory=pl.DataFrame)


_REAL: dict[str, Path] = {}


def real_runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Real runs of the backtest engine on a tiny demo catalog, made once per session.

    One campaign is renamed to a hostile id (``EVIL_ID``) before ingestion, so the report's
    escaping is tested on what the engine really writes. Keys: ``a`` (dual-mirror),
    ``a2`` (the same again), ``b`` (ftl), ``other_catalog`` (dual-mirror on a catalog with
    other contents), ``other_window`` (dual-mirror with a shorter fit window), ``catalog``.
    """
    if _REAL:
        return _REAL
    from replay.engines.local import backtest
    from replay.ingest import ingest
    from replay.scenario import generate_scenario

    root = tmp_path_factory.mktemp("real-runs")
    files = generate_scenario(root / "scenario", campaigns=3, days=2, seed=5,
                              bad_row_share=0.0)
    first = pl.read_parquet(files.campaigns)["campaign_id"][0]
    evil_dir = root / "evil"
    evil_dir.mkdir()
    for name, src in (("auctions.parquet", files.auctions),
                      ("campaigns.parquet", files.campaigns)):
        df = pl.read_parquet(src).with_columns(
            pl.when(pl.col("campaign_id") == first).then(pl.lit(EVIL_ID))
            .otherwise(pl.col("campaign_id")).alias("campaign_id"))
        df.write_parquet(evil_dir / name)
    catalog = root / "catalog"
    ingest([evil_dir / "auctions.parquet"], catalog, campaigns=evil_dir / "campaigns.parquet")
    other = root / "catalog-other"
    ingest([files.auctions], other, campaigns=files.campaigns)
    common = {"workers": 1, "every": "60min", "seed": 0}
    backtest(catalog, "dual-mirror", out=root / "a", **common)
    backtest(catalog, "dual-mirror", out=root / "a2", **common)
    backtest(catalog, "ftl", out=root / "b", **common)
    backtest(other, "dual-mirror", out=root / "other_catalog", **common)
    backtest(catalog, "dual-mirror", out=root / "other_window", train_days=0.5, **common)
    _REAL.update({k: root / k for k in ("a", "a2", "b", "other_catalog", "other_window")})
    _REAL["catalog"] = catalog
    return _REAL


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    return real_runs(tmp_path_factory)


def make_totals(ids: list[str], results: np.ndarray, spend: np.ndarray | None = None,
                opt: np.ndarray | None = None, setting_id: int = 0) -> pl.DataFrame:
    n = len(ids)
    results = np.asarray(results, dtype=float)
    spend = np.full(n, 50.0) if spend is None else np.asarray(spend, dtype=float)
    top = float(results.max(initial=0.0)) + 10.0
    opt = np.full(n, top) if opt is None else np.asarray(opt, float)
    regret = opt - results
    return pl.DataFrame({
        "setting_id": pl.Series([setting_id] * n, dtype=pl.Int32),
        "campaign_id": ids, "budget": np.full(n, 100.0), "results": results, "spend": spend,
        "opt_upper_bound": opt, "regret": regret, "relative_regret": regret / opt,
    })


def make_manifest(rule: str = "rule-a", fingerprint: str = FINGERPRINT,
                  window: dict | None = None) -> dict:
    return {"format": "auction-replay-run", "format_version": 1, "rule": rule,
            "catalog": {"path": "/nowhere", "fingerprint": fingerprint},
            "window": dict(WINDOW if window is None else window), "status": "complete",
            "params": {}, "sweep": {}}


def test_interval_equals_scipy_bootstrap_on_the_same_differences():
    # Source: scipy.stats.bootstrap (reference implementation), called directly on the same
    # per-campaign differences with the same method, level, resamples and seed.
    rng = np.random.default_rng(3)
    ids = [f"c{i:02d}" for i in range(30)]
    ra = rng.uniform(50, 100, 30)
    rb = ra + rng.normal(1.0, 4.0, 30)
    a = MemRun(make_manifest("a"), make_totals(ids, ra, opt=np.full(30, 120.0)))
    b = MemRun(make_manifest("b"), make_totals(ids, rb, opt=np.full(30, 120.0)))
    cmp_ = compare(a, b, level=0.9, seed=5)
    m = cmp_.metrics["results"]
    ref = scipy.stats.bootstrap((rb - ra,), np.mean, confidence_level=0.9, method="BCa",
                                rng=np.random.default_rng(5))
    assert m.method == "BCa"
    assert m.ci_low == pytest.approx(ref.confidence_interval.low, rel=1e-12)
    assert m.ci_high == pytest.approx(ref.confidence_interval.high, rel=1e-12)
    assert m.mean_difference == pytest.approx(np.mean(rb - ra))
    assert m.n == 30
    # regret = opt - results with the same opt: its differences are minus those of results.
    r = cmp_.metrics["regret"]
    assert r.mean_difference == pytest.approx(-m.mean_difference)


def test_interval_close_to_t_interval_for_normal_differences():
    # Source: textbook t-interval for a mean, mean +- t_{n-1} s / sqrt(n) (scipy.stats.t);
    # for 400 normal values the bootstrap interval agrees to a few percent of its width
    # (common practice: bootstrap and t intervals coincide asymptotically for the mean).
    rng = np.random.default_rng(11)
    d = rng.normal(0.3, 1.0, 400)
    low, high, method, _ = bootstrap_mean(d, 0.95, seed=1)
    half = scipy.stats.t.ppf(0.975, d.size - 1) * d.std(ddof=1) / np.sqrt(d.size)
    width = 2 * half
    assert method == "BCa"
    assert abs(low - (d.mean() - half)) < 0.08 * width
    assert abs(high - (d.mean() + half)) < 0.08 * width


def test_verdict_better_when_b_dominates_a():
    rng = np.random.default_rng(1)
    ids = [f"camp-{i}" for i in range(12)]
    ra = rng.uniform(10, 20, 12)
    rb = ra + rng.uniform(0.5, 2.0, 12)  # B wins more results on every campaign
    opt = np.full(12, 40.0)
    a = MemRun(make_manifest("a"), make_totals(ids, ra, opt=opt))
    b = MemRun(make_manifest("b"), make_totals(ids, rb, opt=opt))
    c = compare(a, b)
    assert c.verdict == BETTER
    assert c.metrics["results"].verdict == BETTER
    assert c.metrics["regret"].verdict == BETTER  # lower regret is better
    assert c.metrics["relative_regret"].verdict == BETTER
    assert c.metrics["results"].ci_low > 0
    # Swapping the runs turns the verdict around.
    assert compare(b, a).verdict == WORSE
    assert compare(b, a, metric="regret").verdict == WORSE
    assert "B is better" in c.summary_text()


def test_identical_runs_give_no_detectable_difference_with_percentile_fallback():
    ids = [f"c{i}" for i in range(8)]
    r = np.linspace(10, 30, 8)
    a = MemRun(make_manifest("a"), make_totals(ids, r))
    b = MemRun(make_manifest("a"), make_totals(ids, r))
    c = compare(a, b)
    for m in c.metrics.values():
        assert m.mean_difference == 0.0
        assert m.verdict == NO_DIFFERENCE
        # BCa is undefined on all-equal differences: the comparison says it fell back.
        assert m.method == "percentile"
        assert "BCa undefined" in (m.note or "")
        assert (m.ci_low, m.ci_high) == (0.0, 0.0)
    assert c.verdict == NO_DIFFERENCE


def test_refuses_different_fingerprints_and_windows_unless_forced():
    ids = ["a", "b", "c"]
    t = make_totals(ids, np.array([1.0, 2.0, 3.0]))
    a = MemRun(make_manifest(), t)
    b = MemRun(make_manifest(fingerprint="0" * 16), t)
    with pytest.raises(ReplayError, match="catalog fingerprint differs"):
        compare(a, b)
    other_window = dict(WINDOW, end="2026-03-06T00:00:00+00:00")
    w = MemRun(make_manifest(window=other_window), t)
    with pytest.raises(ReplayError, match=r"window\.end differs"):
        compare(a, w)
    forced = compare(a, b, force=True)
    assert forced.forced and "fingerprint" in forced.forced[0]
    assert forced.verdict == NO_DIFFERENCE


def test_pairs_only_common_campaigns_and_says_so():
    a = MemRun(make_manifest(), make_totals(["x", "y", "z"], np.array([1.0, 2.0, 3.0])))
    b = MemRun(make_manifest(), make_totals(["y", "z", "w"], np.array([5.0, 6.0, 7.0])))
    c = compare(a, b)
    assert c.campaigns == ["y", "z"]
    assert c.per_campaign["results_diff"].to_list() == [3.0, 3.0]  # y: 5-2, z: 6-3
    assert any("only in A" in n for n in c.notes)


def test_empty_run_and_no_common_campaigns_say_why():
    full = MemRun(make_manifest(), make_totals(["x", "y"], np.array([1.0, 2.0])))
    empty = MemRun(make_manifest(), make_totals([], np.array([])))
    c = compare(full, empty)
    assert c.is_empty and "run B has no campaign results" in c.empty_reason
    assert "nothing to compare" in c.summary_text()
    other = MemRun(make_manifest(), make_totals(["q"], np.array([1.0])))
    c2 = compare(full, other)
    assert c2.is_empty and "no campaign in common" in c2.empty_reason
    json.dumps(c2.to_dict())


def test_single_common_campaign_has_no_interval():
    a = MemRun(make_manifest(), make_totals(["x"], np.array([1.0])))
    b = MemRun(make_manifest(), make_totals(["x"], np.array([2.0])))
    m = compare(a, b).metrics["results"]
    assert m.method == "none" and np.isnan(m.ci_low) and m.verdict == NO_DIFFERENCE


def test_bad_options():
    a = MemRun(make_manifest(), make_totals(["x", "y"], np.array([1.0, 2.0])))
    with pytest.raises(UsageError, match="unknown metric"):
        compare(a, a, metric="clicks")
    with pytest.raises(UsageError, match="level"):
        compare(a, a, level=95)
    with pytest.raises(UsageError, match="no setting_id 3"):
        compare(a, a, setting_b=3)


def test_json_is_valid_and_has_the_reference():
    rng = np.random.default_rng(2)
    ids = [f"c{i}" for i in range(10)]
    a = MemRun(make_manifest(), make_totals(ids, rng.uniform(1, 2, 10)))
    b = MemRun(make_manifest(), make_totals(ids, rng.uniform(1, 2, 10)))
    d = json.loads(json.dumps(compare(a, b).to_dict()))
    assert d["campaigns"] == 10
    assert [m["metric"] for m in d["metrics"]] == ["results", "spend", "regret",
                                                   "relative_regret"]
    assert "scipy.stats.bootstrap" in d["reference"]


# ----------------------------------------------------------------- real runs of the engine


def test_real_identical_runs_have_zero_differences(runs):
    c = compare(runs["a"], runs["a2"])
    assert len(c.campaigns) == 3 and EVIL_ID in c.campaigns
    for m in c.metrics.values():
        assert m.mean_difference == 0.0 and m.verdict == NO_DIFFERENCE
        assert m.method == "percentile"  # BCa undefined on all-zero differences


def test_real_runs_interval_matches_scipy(runs):
    # Source: scipy.stats.bootstrap on the per-campaign differences read from the tables.
    c = compare(runs["a"], runs["b"], seed=3)
    ta = pl.read_parquet(runs["a"] / "totals.parquet").sort("campaign_id")
    tb = pl.read_parquet(runs["b"] / "totals.parquet").sort("campaign_id")
    d = (tb["results"] - ta["results"]).to_numpy()
    low, high, method, _ = bootstrap_mean(d, 0.95, seed=3)
    m = c.metrics["results"]
    assert (m.ci_low, m.ci_high, m.method) == (low, high, method)
    if method == "BCa":
        ref = scipy.stats.bootstrap((d,), np.mean, method="BCa", rng=np.random.default_rng(3))
        assert m.ci_low == pytest.approx(ref.confidence_interval.low, rel=1e-12)


def test_real_runs_refused_over_other_catalog_or_window(runs):
    with pytest.raises(ReplayError, match="catalog fingerprint differs"):
        compare(runs["a"], runs["other_catalog"])
    with pytest.raises(ReplayError, match=r"window\.start differs"):
        compare(runs["a"], runs["other_window"])
    assert compare(runs["a"], runs["other_catalog"], force=True).forced


def test_cli_compare_json_and_refusal(runs):
    from typer.testing import CliRunner

    from replay.cli import app

    res = CliRunner().invoke(app, ["compare", str(runs["a"]), str(runs["b"]), "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.output)
    assert d["campaigns"] == 3 and d["rule_a"] == "dual-mirror" and d["rule_b"] == "ftl"
    res = CliRunner().invoke(app, ["compare", str(runs["a"]), str(runs["a2"])])
    assert res.exit_code == 0 and "no detectable difference" in res.output
    res = CliRunner().invoke(app, ["compare", str(runs["a"]), str(runs["other_catalog"])])
    assert res.exit_code != 0
    assert isinstance(res.exception, ReplayError)


def _copy_run(src: Path, dst: Path) -> Path:
    import shutil

    shutil.copytree(src, dst)
    return dst


def test_bad_run_dirs_give_clear_errors(runs, tmp_path):
    from replay.errors import RunStoreError

    missing = _copy_run(runs["a"], tmp_path / "missing")
    (missing / "manifest.json").unlink()
    with pytest.raises(RunStoreError, match="manifest"):
        compare(runs["a"], missing)
    other = _copy_run(runs["a"], tmp_path / "other-version")
    man = json.loads((other / "manifest.json").read_text())
    man["format_version"] = 99
    (other / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(RunStoreError, match="format_version"):
        compare(runs["a"], other)
    corrupt = _copy_run(runs["a"], tmp_path / "corrupt")
    (corrupt / "totals.parquet").write_bytes(b"not parquet at all")
    with pytest.raises(RunStoreError, match="totals.parquet"):
        compare(corrupt, runs["a"])


def test_empty_real_run_says_why(runs, tmp_path):
    empty = _copy_run(runs["a"], tmp_path / "empty")
    pl.read_parquet(empty / "totals.parquet").clear().write_parquet(empty / "totals.parquet")
    c = compare(runs["a"], empty)
    assert c.is_empty and "run B has no campaign results" in c.empty_reason
