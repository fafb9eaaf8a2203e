"""`replay backtest` on the command line: --json keys, screen output, and one clear line for
each kind of bad input (issue 4: unknown rule or parameter, wrong unit or sign, empty
window). Durations and windows are checked directly too."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from replay.catalog import Catalog
from replay.cli import main
from replay.engines.windows import (
    compute_windows,
    parse_duration,
    parse_set,
)
from replay.errors import UsageError
from replay.ingest import ingest
from replay.rules.registry import get_rule
from replay.scenario import generate_scenario

JSON_KEYS = {"campaign_id", "results", "spend", "wins", "cost_per_result", "optimum",
             "optimum_detail", "regret"}


@pytest.fixture(scope="module")
def cat(tmp_path_factory) -> Catalog:
    root = tmp_path_factory.mktemp("cli")
    files = generate_scenario(root / "scenario", campaigns=2, days=2, seed=9)
    log = pl.read_parquet(files.auctions)
    log.with_row_index("_i").filter(pl.col("_i") % 5 == 0).drop("_i") \
        .write_parquet(root / "small.parquet")
    ingest([root / "small.parquet"], root / "catalog", campaigns=files.campaigns)
    return Catalog(root / "catalog")


def run_cli(args: list[str], capsys) -> tuple[int, str, str]:
    with pytest.raises(SystemExit) as exc:
        main([str(a) for a in args])
    out = capsys.readouterr()
    return int(exc.value.code or 0), out.out, out.err


def test_json_has_one_object_per_campaign(cat: Catalog, tmp_path: Path, capsys) -> None:
    code, out, _ = run_cli(["backtest", cat.path, "--rule", "dual-mirror", "--set", "step=0.1",
                            "--every", "30min", "--workers", "1", "--out", tmp_path / "r",
                            "--json"], capsys)
    assert code == 0
    rows = json.loads(out)
    assert len(rows) == len(cat.campaigns())
    for r in rows:
        assert set(r) >= JSON_KEYS
        assert r["optimum"] == r["optimum_detail"]["upper_bound"]
        assert r["regret"] == pytest.approx(r["optimum"] - r["results"])
    manifest = json.loads((tmp_path / "r" / "manifest.json").read_text())
    assert manifest["params"] == {"step": 0.1}
    assert manifest["schedule"] == {"every_seconds": 1800.0}


def test_sweep_json_and_screen_table(cat: Catalog, tmp_path: Path, capsys) -> None:
    code, out, _ = run_cli(["backtest", cat.path, "--rule", "dual-gradient", "--sweep",
                            "step=0.05,0.1", "--sweep", "every_n=200,800", "--workers", "1",
                            "--out", tmp_path / "s", "--json"], capsys)
    assert code == 0
    rows = json.loads(out)
    assert len(rows) == 4 * len(cat.campaigns())
    assert {r["setting_id"] for r in rows} == {0, 1, 2, 3}
    assert all("setting" in r for r in rows)
    code, out, _ = run_cli(["backtest", cat.path, "--rule", "dual-gradient", "--sweep",
                            "step=0.05,0.1", "--workers", "1", "--out", tmp_path / "s2"], capsys)
    assert code == 0
    assert "ranked by mean relative regret" in out
    assert "step=0.05" in out and "step=0.1" in out
    assert "cautions: competitors' bids are held fixed" in out


@pytest.mark.parametrize(("extra", "needle"), [
    (["--rule", "no-such-rule"], "unknown rule 'no-such-rule'; allowed: "),
    (["--rule", "dual-mirror", "--set", "stepp=1"], "unknown parameter 'stepp'; allowed:"),
    (["--rule", "dual-mirror", "--set", "step=-0.1"], "parameter 'step'"),
    (["--rule", "dual-mirror", "--every", "15"], "missing unit"),
    (["--rule", "dual-mirror", "--every", "-5min"], "must be positive"),
    (["--rule", "dual-mirror", "--every", "0s"], "must be positive"),
    (["--rule", "dual-mirror", "--every", "15min", "--every-n", "10"], "exclude each other"),
    (["--rule", "dual-mirror", "--start", "2030-01-01"], "empty replay window"),
    (["--rule", "dual-mirror", "--charges", "maybe"], "--charges 'maybe': allowed"),
    (["--rule", "dual-mirror", "--budget-scale", "-1"], "--budget-scale"),
    (["--rule", "dual-mirror", "--campaign", "nope"], "--campaign 'nope': not in the campaign"),
    (["--rule", "dual-mirror", "--shading", "magic"], "--shading 'magic': allowed"),
])
def test_bad_input_gives_one_clear_line(cat: Catalog, tmp_path: Path, capsys, extra,
                                        needle) -> None:
    code, _, err = run_cli(["backtest", cat.path, *extra, "--out", tmp_path / "bad"], capsys)
    assert code == 2
    lines = [x for x in err.splitlines() if x.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: ")
    assert needle in lines[0]
    assert "Traceback" not in err


def test_durations() -> None:
    assert parse_duration("30s") == 30_000_000
    assert parse_duration("15min") == 900_000_000
    assert parse_duration("1.5h") == 5_400_000_000
    assert parse_duration("2d") == 172_800_000_000
    for bad, why in (("15", "missing unit"), ("-1h", "positive"), ("0min", "positive"),
                     ("15m", "unknown unit"), ("soon", "not a duration"), ("", "not a")):
        with pytest.raises(UsageError, match=why):
            parse_duration(bad)


def test_windows_defaults_and_no_look_ahead() -> None:
    day = 86_400_000_000
    lo, hi = 10 * day + 7, 13 * day
    w = compute_windows((lo, hi), train_days=1.0)
    assert (w.start_us, w.end_us) == (11 * day, hi + 1)  # start floored to the minute
    assert (w.train_start_us, w.train_end_us) == (10 * day, 11 * day)
    w = compute_windows((lo, hi), start=12 * day, train_days=0.5)
    assert (w.train_start_us, w.train_end_us) == (11.5 * day, 12 * day)
    with pytest.raises(UsageError, match="no look-ahead"):
        compute_windows((lo, hi), start=11 * day, train_end=12 * day)
    with pytest.raises(UsageError, match="empty replay window"):
        compute_windows((lo, hi), start=12 * day, end=12 * day)
    with pytest.raises(UsageError, match="--train-days"):
        compute_windows((lo, hi), train_days=-1)
    with pytest.raises(UsageError, match="not a time"):
        compute_windows((lo, hi), start="yesterday")


def test_set_is_typed_by_the_rule() -> None:
    rule = get_rule("dual-mirror")
    params = parse_set(["step=0.2", "normalize=false"], rule)
    assert params == {"step": 0.2, "normalize": False}
    with pytest.raises(UsageError, match="expected key=value"):
        parse_set(["step"], rule)
