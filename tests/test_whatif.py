"""`whatif`: a campaign as it is beside a changed setting, each with its own optimum."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy.optimize import linprog

from replay.catalog import Catalog
from replay.cli import main
from replay.engines.local import backtest, whatif
from replay.errors import UsageError
from replay.ingest import ingest
from replay.scenario import generate_scenario


@pytest.fixture(scope="module")
def cat(tmp_path_factory) -> Catalog:
    root = tmp_path_factory.mktemp("whatif")
    files = generate_scenario(root / "scenario", campaigns=3, days=2, seed=21)
    log = pl.read_parquet(files.auctions)
    log.with_row_index("_i").filter(pl.col("_i") % 5 == 0).drop("_i") \
        .write_parquet(root / "small.parquet")
    ingest([root / "small.parquet"], root / "catalog", campaigns=files.campaigns)
    return Catalog(root / "catalog")


def _lp(value: np.ndarray, price: np.ndarray, budget: float, cap: float | None) -> float:
    # Source: scipy.optimize.linprog, HiGHS (general-purpose LP reference).
    a, b = [price], [budget]
    if cap is not None:
        a.append(price - cap * value)
        b.append(0.0)
    res = linprog(-value, A_ub=np.vstack(a), b_ub=b, bounds=(0, 1), method="highs")
    return -res.fun


def test_baseline_is_the_backtest_and_changes_apply(cat: Catalog) -> None:
    cid = sorted(cat.campaigns())[0]
    spec = cat.campaigns()[cid]
    feed = [p for p, q in cat.placements() if q == "second_price"][0]
    res = whatif(cat, cid, budget=spec.budget / 2, cap=0.5, exclude_placements=[feed])
    bt = backtest(cat, "dual-mirror", campaigns=[cid], workers=1)
    base = bt.totals.row(0, named=True)
    # The baseline side is exactly the default backtest of that campaign.
    for key in ("results", "spend", "wins", "regret", "opt_upper_bound"):
        assert res.baseline[key] == pytest.approx(base[key], rel=1e-12)
    ch = res.changed
    assert ch["budget"] == pytest.approx(spec.budget / 2)
    assert ch["max_cost_per_result"] == 0.5
    assert ch["excluded_placements"] == [feed]
    # Its optimum is the LP of its own rows (feed removed), half budget and the new cap.
    w = bt.manifest["window"]
    df = cat.auctions(cid, start=w["start"], end=w["end"],
                      columns=["placement", "value", "min_win_price"])
    assert df.height == base["auctions"]
    kept = df.filter(pl.col("placement") != feed)
    assert ch["auctions"] == kept.height
    ub = _lp(kept["value"].to_numpy(), kept["min_win_price"].to_numpy(), spec.budget / 2, 0.5)
    assert ch["optimum"] == pytest.approx(ub, rel=1e-6)
    assert res.placements["changed"].filter(pl.col("placement") == feed).height == 0
    assert set(res.table["metric"]) >= {"results", "spend", "optimum", "regret"}


def test_rule_change_and_errors(cat: Catalog) -> None:
    cid = sorted(cat.campaigns())[1]
    res = whatif(cat, cid, rule="fixed-multiplier", params={"multiplier": 0.5})
    assert res.changed["rule"] == "fixed-multiplier"
    assert res.changed["params"] == {"multiplier": 0.5}
    assert res.baseline["optimum"] == pytest.approx(res.changed["optimum"])  # same rows
    with pytest.raises(UsageError, match="--exclude-placement 'nowhere': unknown placement"):
        whatif(cat, cid, exclude_placements=["nowhere"])
    with pytest.raises(UsageError, match="--cap"):
        whatif(cat, cid, cap=-1)
    with pytest.raises(UsageError, match="--budget"):
        whatif(cat, cid, budget=0)
    with pytest.raises(UsageError, match="not in the campaign table"):
        whatif(cat, "nope")


def test_cli_json_and_table(cat: Catalog, capsys, tmp_path: Path) -> None:
    cid = sorted(cat.campaigns())[2]
    with pytest.raises(SystemExit) as exc:
        main(["whatif", str(cat.path), "--campaign", cid, "--budget", "5", "--cap", "none",
              "--json"])
    assert exc.value.code in (0, None)
    doc = json.loads(capsys.readouterr().out)
    assert doc["campaign_id"] == cid
    for side in ("baseline", "changed"):
        assert {"results", "spend", "optimum", "regret", "rule"} <= set(doc[side])
    assert doc["changed"]["budget"] == 5.0 and doc["changed"]["max_cost_per_result"] is None
    with pytest.raises(SystemExit) as exc:
        main(["whatif", str(cat.path), "--campaign", cid, "--rule", "pid", "--set", "kp=3"])
    out = capsys.readouterr().out
    assert exc.value.code in (0, None)
    assert "baseline (dual-mirror)" in out and "changed (pid)" in out
    assert "cautions:" in out
