"""Run store: atomic parts, consolidation, manifest checks and the clear errors of open_run."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from replay.errors import RunStoreError
from replay.runstore import (
    FORMAT,
    FORMAT_VERSION,
    PARTS_DIR,
    RunStore,
    open_run,
    part_key,
)

# Keys DEVELOPERS.md ("Run store layout") promises in manifest.json.
MANIFEST_KEYS = ("format", "format_version", "code_version", "rule", "params", "sweep",
                 "catalog", "window", "schedule", "charges", "seed", "campaigns", "status",
                 "created_at")


def _manifest(**over) -> dict:
    m = {"rule": "dual-mirror", "params": {"step": 0.1}, "sweep": {},
         "catalog": {"path": "/x", "fingerprint": "abc"},
         "window": {"start": "2026-03-02T00:00:00Z", "end": "2026-03-03T00:00:00Z",
                    "train_start": "2026-03-01T00:00:00Z", "train_end": "2026-03-02T00:00:00Z"},
         "schedule": {"every_seconds": 900.0}, "charges": "expected", "seed": 3,
         "campaigns": ["a", "b"], "budget_scale": 1.0, "shading": "empirical"}
    m.update(over)
    return m


def _tables(cid: str, results: float) -> dict[str, pl.DataFrame]:
    totals = pl.DataFrame({"setting_id": [0], "campaign_id": [cid], "results": [results],
                           "spend": [1.0]})
    # Fill the documented columns the test does not care about with nulls.
    from replay.runstore import PLACEMENTS_SCHEMA, SERIES_SCHEMA, TOTALS_SCHEMA

    def full(df: pl.DataFrame, schema: dict) -> pl.DataFrame:
        return df.with_columns([pl.lit(None).cast(t).alias(c) for c, t in schema.items()
                                if c not in df.columns])

    series = pl.DataFrame({"setting_id": [0, 0], "campaign_id": [cid, cid], "update": [1, 0]})
    plc = pl.DataFrame({"setting_id": [0], "campaign_id": [cid], "placement": ["feed"]})
    return {"totals": full(totals, TOTALS_SCHEMA), "series": full(series, SERIES_SCHEMA),
            "placements": full(plc, PLACEMENTS_SCHEMA)}


def _finished_run(tmp_path: Path) -> Path:
    run = tmp_path / "run"
    store = RunStore.create(run, _manifest())
    store.write_campaign("b", _tables("b", 2.0))
    store.write_campaign("a", _tables("a", 1.0))
    store.finish(pl.DataFrame({"setting_id": pl.Series([0], dtype=pl.Int32),
                               "label": ["base"]}))
    return run


def test_finished_run_reads_back_sorted_with_documented_manifest(tmp_path: Path) -> None:
    run_dir = _finished_run(tmp_path)
    run = open_run(run_dir)
    assert run.manifest["status"] == "complete"
    for key in MANIFEST_KEYS:
        assert key in run.manifest, key
    assert run.manifest["format"] == FORMAT and run.manifest["format_version"] == FORMAT_VERSION
    # Sorted by campaign whatever the write order; series by update.
    assert run.totals["campaign_id"].to_list() == ["a", "b"]
    assert run.series["update"].to_list() == [0, 1, 0, 1]
    assert run.totals["setting_id"].dtype == pl.Int32
    assert not (run_dir / PARTS_DIR).exists()  # parts are dropped once consolidated
    assert not list(run_dir.glob(".*tmp*"))  # no temporary file left behind


def test_missing_manifest_is_a_clear_error(tmp_path: Path) -> None:
    (tmp_path / "empty").mkdir()
    with pytest.raises(RunStoreError, match="missing manifest.json"):
        open_run(tmp_path / "empty")


def test_other_format_version_is_refused(tmp_path: Path) -> None:
    run_dir = _finished_run(tmp_path)
    m = json.loads((run_dir / "manifest.json").read_text())
    m["format_version"] = FORMAT_VERSION + 1
    (run_dir / "manifest.json").write_text(json.dumps(m))
    with pytest.raises(RunStoreError, match="format_version"):
        open_run(run_dir)


def test_corrupted_table_is_a_clear_error(tmp_path: Path) -> None:
    run_dir = _finished_run(tmp_path)
    data = (run_dir / "series.parquet").read_bytes()
    (run_dir / "series.parquet").write_bytes(data[: len(data) // 2])  # truncated file
    with pytest.raises(RunStoreError, match=r"series\.parquet: corrupted table"):
        open_run(run_dir)



def test_a_run_written_before_the_cap_part_reads_with_nulls_there(tmp_path: Path) -> None:
    run_dir = _finished_run(tmp_path)
    old = pl.read_parquet(run_dir / "totals.parquet").drop("regret_cap_slack")
    old.write_parquet(run_dir / "totals.parquet")
    run = open_run(run_dir)
    assert run.totals["regret_cap_slack"].is_null().all()
    assert run.totals["campaign_id"].to_list() == ["a", "b"]
    # any other missing column is still an error
    old.drop("regret_misallocation").write_parquet(run_dir / "totals.parquet")
    with pytest.raises(RunStoreError, match="missing columns regret_misallocation"):
        open_run(run_dir)

def test_running_run_needs_resume(tmp_path: Path) -> None:
    run = tmp_path / "run"
    store = RunStore.create(run, _manifest())
    store.write_campaign("a", _tables("a", 1.0))
    with pytest.raises(RunStoreError, match="not complete.*--resume"):
        open_run(run)
    # The parts written so far are readable on request.
    partial = open_run(run, allow_running=True)
    assert partial.totals["campaign_id"].to_list() == ["a"]


def test_resume_keeps_parts_and_refuses_other_inputs(tmp_path: Path) -> None:
    run = tmp_path / "run"
    store = RunStore.create(run, _manifest())
    store.write_campaign("a", _tables("a", 1.0))
    # A half-written part (interrupted before its rename) must not count as done.
    (run / PARTS_DIR / f".{part_key('b')}.tmp-999").mkdir()
    again = RunStore.create(run, _manifest(), resume=True)
    assert again.is_done("a") and not again.is_done("b")
    assert not list((run / PARTS_DIR).glob(".*"))
    with pytest.raises(RunStoreError, match="other inputs: seed"):
        RunStore.create(run, _manifest(seed=4), resume=True)
    with pytest.raises(RunStoreError, match="catalog.fingerprint"):
        RunStore.create(run, _manifest(catalog={"path": "/x", "fingerprint": "zzz"}),
                        resume=True)


def test_existing_output_folder_is_not_overwritten(tmp_path: Path) -> None:
    run_dir = _finished_run(tmp_path)
    with pytest.raises(RunStoreError, match="not empty"):
        RunStore.create(run_dir, _manifest())


def test_part_keys_are_distinct_and_safe() -> None:
    keys = {part_key(c) for c in ("a/b", "a_b", "a b", "../x", "é")}
    assert len(keys) == 5
    assert all("/" not in k and not k.startswith(".") for k in keys)
