"""``replay hindsight`` and ``replay.analysis.hindsight`` end to end on a small catalog."""

from __future__ import annotations

import json
import warnings

import numpy as np
import polars as pl
import pytest
from scipy.optimize import linprog
from typer.testing import CliRunner

from replay.analysis.hindsight import JSON_KEYS, hindsight, solve_campaign_arrays
from replay.schema import CampaignArrays, CampaignSpec


@pytest.fixture(scope="module")
def catalog(tmp_path_factory):
    from replay.catalog import Catalog
    from replay.ingest import ingest
    from replay.scenario import generate_scenario

    root = tmp_path_factory.mktemp("hindsight")
    files = generate_scenario(root / "scenario", campaigns=5, days=1, seed=5)
    ingest([files.auctions], root / "catalog", campaigns=files.campaigns)
    return Catalog(root / "catalog")


def _arrays(n=500, seed=0, cid="solo"):
    rng = np.random.default_rng(seed)
    return CampaignArrays(
        campaign_id=cid, ts_us=np.arange(n, dtype=np.int64) * 1_000_000,
        value=rng.exponential(0.02, n), min_win_price=rng.lognormal(-6, 1, n),
        charge_prob=np.ones(n), placement_code=rng.integers(0, 2, n).astype(np.int32),
        first_price=rng.random(n) < 0.5, placements=("feed", "partner"))


def test_arrays_source_matches_highs_and_reports_errors():
    a = _arrays()
    budget = 0.2 * a.min_win_price.sum()
    df = hindsight(a, budget=budget)
    row = df.row(0, named=True)
    # Source: scipy.optimize.linprog (HiGHS) on the same rows and budget.
    res = linprog(-a.value, A_ub=a.min_win_price.reshape(1, -1), b_ub=[budget], bounds=(0, 1),
                  method="highs")
    assert abs(row["upper_bound"] + res.fun) <= 1e-9 * row["upper_bound"]
    assert row["binding"] == "budget" and row["error"] is None
    # Window: only the first 100 seconds.
    w = hindsight(a, budget=budget, start=0, end=100_000_000).row(0, named=True)
    assert w["rows"] == 100
    # Bad budgets and empty windows: an error row naming the campaign, no exception.
    for bad in (0.0, -1.0, float("nan"), None):
        r = hindsight(a, budget=bad).row(0, named=True)
        assert "solo" in r["error"] and "budget" in r["error"]
    r = hindsight(a, budget=1.0, start=10**15).row(0, named=True)
    assert "solo" in r["error"] and "no auction rows" in r["error"]


def test_solve_campaign_arrays_group_budget_is_shared():
    a, b = _arrays(400, 1, "a"), _arrays(400, 2, "b")
    ids = np.array([f"r{i}" for i in range(400)], dtype=object)
    a = CampaignArrays(**{**a.__dict__, "request_id": ids})
    b = CampaignArrays(**{**b.__dict__, "request_id": ids})  # every request contested
    budget = 0.2 * (a.min_win_price.sum() + b.min_win_price.sum())
    row = solve_campaign_arrays([a, b], CampaignSpec("g", budget), curve=None)
    assert row["members"] == ["a", "b"] and row["error"] is None
    assert row["spend"] <= budget
    parts = row["member_breakdown"]
    assert sum(p["wins"] for p in parts) == row["wins"]
    # At most one winner per request: no more wins than requests.
    assert row["wins"] <= 400


def test_catalog_rows_groups_and_curve(catalog):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        df = hindsight(catalog, workers=1, curve="0.5:2:3")
    specs = catalog.campaigns()
    groups = {s.group_id for s in specs.values() if s.group_id}
    singles = {c for c, s in specs.items() if not s.group_id}
    assert set(df["campaign_id"]) == groups | singles
    assert df["error"].is_null().all()
    for row in df.to_dicts():
        assert abs(row["gap"]) <= 1e-9 * max(1.0, row["upper_bound"])
        assert row["spend"] <= row["budget"] * (1 + 1e-12)
        curve = row["curve"]
        assert [c["budget_scale"] for c in curve] == pytest.approx([0.5, 1.0, 2.0])
        assert curve[1]["upper_bound"] == pytest.approx(row["upper_bound"], rel=1e-9)
        assert curve[0]["results"] <= curve[1]["results"] <= curve[2]["results"]
        if len(row["members"]) > 1:
            assert row["budget"] == pytest.approx(sum(specs[m].budget for m in row["members"]))


def test_cli_json_keys_out_files_and_warnings(catalog, tmp_path):
    from replay.cli import app

    runner = CliRunner()
    cid = sorted(c for c, s in catalog.campaigns().items() if not s.group_id)[0]
    out = tmp_path / "h.parquet"
    res = runner.invoke(app, ["hindsight", str(catalog.path), "--campaign", cid,
                              "--campaign", "nobody", "--json", "--workers", "1",
                              "--out", str(out)])
    assert res.exit_code == 0, res.output
    text = res.stdout
    data = json.loads(text[text.index("["):])
    assert len(data) == 1 and set(data[0]) == set(JSON_KEYS)
    assert data[0]["campaign_id"] == cid
    assert "warning: campaign nobody" in res.output
    back = pl.read_parquet(out)
    assert set(back["campaign_id"]) == {cid, "nobody"}

    res = runner.invoke(app, ["hindsight", str(catalog.path), "--campaign", cid, "--json",
                              "--curve", "0.25:4:16", "--workers", "1",
                              "--out", str(tmp_path / "h.csv")])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout[res.stdout.index("["):])
    assert set(data[0]) == set(JSON_KEYS) | {"curve"} and len(data[0]["curve"]) == 16
    assert set(data[0]["curve"][0]) == {"budget_scale", "budget", "results", "upper_bound",
                                        "lambda"}
    assert pl.read_csv(tmp_path / "h.csv").height == 1

    res = runner.invoke(app, ["hindsight", str(catalog.path), "--workers", "1"])
    assert res.exit_code == 0 and "Hindsight optimum" in res.stdout


@pytest.mark.parametrize("args,needle", [
    (["--curve", "1:2"], "--curve"),
    (["--budget-scale", "-1"], "--budget-scale"),
    (["--out", "x.txt"], "--out"),
    (["--start", "yesterday"], "ISO-8601"),
])
def test_cli_bad_options_give_one_line(catalog, capsys, args, needle):
    from replay.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["hindsight", str(catalog.path), *args])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error:") and needle in err[0]


def test_process_pool_gives_the_same_rows(catalog):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = hindsight(catalog, workers=1)
        b = hindsight(str(catalog.path), workers=2)
    assert a.drop("placements", "member_breakdown").equals(
        b.drop("placements", "member_breakdown"))
