"""`replay bench --quick --json` keeps working and keeps its documented keys.

Timings are never asserted (speed is a benchmark matter); only the JSON contract
documented in DEVELOPERS.md ("Benchmarks") is.
"""

import json
import subprocess
import sys

CASE_KEYS = {"rows", "seconds", "rows_per_s", "peak_rss_mb", "fraction_of_reference"}
TOP_CASES = ("reference", "ingest_parquet", "ingest_csv", "catalog_scan", "hindsight",
             "hindsight_curve", "backtest_demo")


def test_bench_quick_json_keys() -> None:
    proc = subprocess.run(
        [sys.executable, "-m", "replay.cli", "bench", "--quick", "--json"],
        capture_output=True, text=True, timeout=600,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    result = json.loads(proc.stdout)
    assert result["format_version"] == 1
    assert {"cpus", "python", "numpy", "numba"} <= set(result["machine"])
    for name in TOP_CASES:
        assert "error" not in result[name], (name, result[name])
        assert set(result[name]) >= CASE_KEYS, name
        assert result[name]["rows"] > 0
    from replay.rules.registry import list_rules

    for cls in list_rules():
        for schedule in ("batch", "every_1000", "per_request"):
            entry = result["rules"][cls.name][schedule]
            assert "error" not in entry, (cls.name, schedule, entry)
            assert set(entry) >= CASE_KEYS
    assert set(result["rules"]["ftl"]["1000_updates"]) >= CASE_KEYS
    assert result["ftl_vs_hindsight"]["ratio"] > 0
    assert result["machine"]["cpu_model"]
    # --quick runs far below the sizes the goals are stated for: none is judged
    statuses = {t["status"] for t in result["targets"]}
    assert statuses <= {"below target size", "not measured"}, statuses
    cases = {t["case"] for t in result["targets"]}
    assert cases >= {"hindsight", "ftl_vs_hindsight", "ingest_parquet",
                     "rules.pid.per_request"}
    assert "backtest_large" not in cases  # a --large case: not run, so not listed


def test_goals_are_judged_from_the_measured_values() -> None:
    """Each goal is met, missed, not measured (case absent or failed) or below its size."""
    from replay.bench import evaluate_targets

    def case(rows: int, rate: float) -> dict:
        return {"rows": rows, "seconds": rows / rate, "rows_per_s": rate}

    result = {
        "hindsight": case(10_000_000, 120e6),
        "ingest_parquet": {"error": "OSError: disk full"},
        "rules": {"dual-mirror": {"batch": case(10_300_000, 99e6),
                                  "every_1000": case(1_000_000, 300e6),
                                  "per_request": case(10_300_000, 31e6)},
                  "ftl": {"1000_updates": case(10_300_000, 40e6),
                          "per_request": case(10_300_000, 1e6)}},
        "ftl_vs_hindsight": {"ratio": 3.0},
    }
    got = {t["case"]: t for t in evaluate_targets(result)}
    assert got["hindsight"]["status"] == "met" and got["hindsight"]["measured"] == 120e6
    assert got["rules.dual-mirror.batch"]["status"] == "missed"
    assert got["rules.dual-mirror.every_1000"]["status"] == "below target size"
    assert got["rules.dual-mirror.per_request"]["status"] == "met"
    assert got["ftl_vs_hindsight"]["status"] == "met"  # at most 3x: 3.0 is within
    assert got["ingest_parquet"]["status"] == "not measured"  # it failed
    assert "backtest_large" not in got  # not run
    # ftl's own goal is its 1,000-update cost: no per-request rate goal for it
    assert "rules.ftl.per_request" not in got


def test_bench_table_save_and_against(tmp_path) -> None:
    """The on-screen table path, --save and --against (a saved run compared with itself)."""
    import os

    env = {**os.environ, "COLUMNS": "200"}  # rich wraps headers at 80 columns otherwise
    saved = tmp_path / "bench.json"
    cmd = [sys.executable, "-m", "replay.cli", "bench", "--quick", "--only", "hindsight"]
    first = subprocess.run(cmd + ["--save", str(saved)], capture_output=True, text=True,
                           timeout=600, env=env)
    assert first.returncode == 0, first.stderr[-2000:]
    assert "hindsight" in first.stdout and "M rows/s" in first.stdout
    assert set(json.loads(saved.read_text())["hindsight"]) >= CASE_KEYS
    second = subprocess.run(cmd + ["--against", str(saved)], capture_output=True, text=True,
                            timeout=600, env=env)
    assert second.returncode == 0, second.stderr[-2000:]
    assert "speed vs saved" in second.stdout
    assert "hindsight solve" in second.stdout and "below target size" in second.stdout
    assert "Parquet ingest" not in second.stdout  # only the goals of the cases that ran
    bad = subprocess.run(cmd + ["--against", str(tmp_path / "missing.json")],
                         capture_output=True, text=True, timeout=600)
    assert bad.returncode == 2 and "missing.json" in bad.stderr


def test_bench_large_cases_keys() -> None:
    """``--large`` (here with --quick's small sizes): hindsight scaling and the backtest over
    a many-campaign catalog with the peak memory of the whole process tree."""
    proc = subprocess.run(
        [sys.executable, "-m", "replay.cli", "bench", "--quick", "--large", "--only",
         "hindsight_", "--only", "backtest_large", "--json"],
        capture_output=True, text=True, timeout=600,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    result = json.loads(proc.stdout)
    for name in ("hindsight_1m", "hindsight_large", "backtest_large"):
        assert "error" not in result[name], (name, result[name])
        assert set(result[name]) >= CASE_KEYS, name
    big = result["backtest_large"]
    assert big["rows"] == 200_000 and big["campaigns"] == 2
    assert big["peak_tree_rss_mb"] > 0 and big["ingest_seconds"] > 0
    assert result["config"]["large_rows"] == 200_000
