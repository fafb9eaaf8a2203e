"""`replay demo` at a small size runs end to end and leaves every promised artifact."""

import json
import subprocess
import sys
from pathlib import Path

import polars as pl


def test_demo_small_end_to_end(tmp_path: Path) -> None:
    out = tmp_path / "demo"
    proc = subprocess.run(
        [sys.executable, "-m", "replay.cli", "demo", "--out", str(out), "--campaigns", "3",
         "--days", "2", "--workers", "1"],
        capture_output=True, text=True, timeout=600,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert (out / "report.html").stat().st_size > 10_000
    assert "report" in proc.stdout and "held fixed" in proc.stdout
    optimum = pl.read_parquet(out / "hindsight.parquet")
    assert optimum.height >= 1
    for rule in ("dual-mirror", "ftl"):
        manifest = json.loads((out / "runs" / rule / "manifest.json").read_text())
        assert manifest["status"] == "complete"
        totals = pl.read_parquet(out / "runs" / rule / "totals.parquet")
        # A feasible replay (within budget, cap respected) never beats the LP upper bound
        # of the same rows, budget and cap (LP relaxation bound; Dantzig 1957).
        feasible = totals.filter(~pl.col("cap_violated") & (pl.col("spend") <= pl.col("budget")))
        assert (feasible["results"] <= feasible["opt_upper_bound"] * (1 + 1e-9) + 1e-12).all()
