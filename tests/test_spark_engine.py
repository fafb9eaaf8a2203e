"""Spark engine: same groups, same kernels, same tables as the local engine (local[2]).

One SparkSession serves the whole module. Skipped, with the reason, when pyspark or Java
is missing (install with ``pip install '.[spark]'``).
"""

from __future__ import annotations

import importlib.util
import os
import shutil
import sys
from datetime import UTC, datetime

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from replay.errors import UsageError
from replay.schema import AUCTION_SCHEMA, PARTITION_COLUMN

pytestmark = pytest.mark.spark

_HAVE_SPARK = importlib.util.find_spec("pyspark") is not None
_HAVE_JAVA = bool(os.environ.get("JAVA_HOME") or shutil.which("java"))
_SKIP_REASON = ("pyspark is not installed (pip install '.[spark]')" if not _HAVE_SPARK
                else "Java is not installed (Spark needs Java 17)")
needs_spark = pytest.mark.skipif(not (_HAVE_SPARK and _HAVE_JAVA), reason=_SKIP_REASON)

T0_US = int(datetime(2026, 3, 1, tzinfo=UTC).timestamp()) * 1_000_000
DAY_US = 86_400 * 1_000_000


@pytest.fixture(scope="module")
def spark():
    if not (_HAVE_SPARK and _HAVE_JAVA):
        pytest.skip(_SKIP_REASON)
    from pyspark import cloudpickle

    from replay.engines.spark import get_session

    # Functions defined in this test module must travel by value: workers cannot import tests/.
    cloudpickle.register_pickle_by_value(sys.modules[__name__])
    session = get_session("local[2]", app_name="auction-replay-tests")
    yield session
    session.stop()


def _write_hive_catalog(root, n: int = 4000, seed: int = 1) -> pa.Table:
    """A small catalog folder in the catalog's layout: auctions/date=YYYY-MM-DD/*.parquet."""
    rng = np.random.default_rng(seed)
    # Whole seconds and a few repeated timestamps: ties in time must not change the order.
    ts = T0_US + rng.integers(0, 3 * 86_400, n) * 1_000_000
    ts[: n // 10] = ts[n // 10: 2 * (n // 10)]
    tab = pa.table({
        "ts": pa.array(ts, pa.timestamp("us", tz="UTC")),
        "campaign_id": rng.choice(["c1", "c2", "c3", "c4"], n, p=[0.4, 0.3, 0.2, 0.1]),
        "placement": rng.choice(["feed", "partner_app"], n),
        "pricing": rng.choice(["first_price", "second_price"], n),
        "value": rng.exponential(0.02, n),
        "min_win_price": rng.lognormal(-6.0, 1.0, n),
        "request_id": [f"r{i}" for i in range(n)],
        "charge_prob": np.where(rng.random(n) < 0.2, 0.05, 1.0),
    }, schema=AUCTION_SCHEMA)
    dates = pc.strftime(tab["ts"], "%Y-%m-%d")
    for d in sorted(set(dates.to_pylist())):
        folder = root / "auctions" / f"{PARTITION_COLUMN}={d}"
        folder.mkdir(parents=True)
        pq.write_table(tab.filter(pc.equal(dates, d)), folder / "part-0.parquet")
    return tab


@pytest.fixture(scope="module")
def hive_catalog(tmp_path_factory):
    root = tmp_path_factory.mktemp("hive")
    return root, _write_hive_catalog(root)


def _per_campaign_fn(placements):
    from replay.engines.spark import arrays_from_arrow

    def fn(key: str, table: pa.Table) -> pa.Table:
        a = arrays_from_arrow(table, key, placements)
        return pa.table({
            "campaign_id": [key], "rows": [len(a)], "value": [float(a.value.sum())],
            "first_ts_us": [int(a.ts_us[0])], "sorted": [bool(np.all(np.diff(a.ts_us) >= 0))],
            "fp_rows": [int(a.first_price.sum())],
            "codes": [",".join(map(str, np.bincount(a.placement_code, minlength=4)))],
        })

    return fn


@needs_spark
def test_group_mapping_matches_plain_arrow(spark, hive_catalog) -> None:
    # Reference: the same per-campaign aggregates computed directly with polars on the
    # written table (outside Spark and outside the engine).
    from replay.engines.spark import catalog_placements, map_campaign_groups

    root, tab = hive_catalog
    placements = catalog_placements(spark, root)
    assert placements == sorted(set(zip(tab["placement"].to_pylist(),
                                        tab["pricing"].to_pylist(), strict=True)))
    start, end = T0_US + DAY_US // 2, T0_US + 2 * DAY_US  # prunes the third partition
    out = map_campaign_groups(root, _per_campaign_fn(placements), window=(start, end),
                              spark=spark)
    got = pl.from_arrow(out).sort("campaign_id")
    df = pl.from_arrow(tab).with_columns(pl.col("ts").dt.epoch("us").alias("ts_us"))
    df = df.filter((pl.col("ts_us") >= start) & (pl.col("ts_us") < end))
    ref = df.group_by("campaign_id").agg(
        pl.len().alias("rows"), pl.col("value").sum(), pl.col("ts_us").min().alias("first_ts_us"),
        (pl.col("pricing") == "first_price").sum().alias("fp_rows")).sort("campaign_id")
    assert got["campaign_id"].to_list() == ref["campaign_id"].to_list()
    assert got["rows"].to_list() == ref["rows"].to_list()
    assert got["first_ts_us"].to_list() == ref["first_ts_us"].to_list()
    assert got["fp_rows"].to_list() == ref["fp_rows"].cast(pl.Int64).to_list()
    assert np.allclose(got["value"].to_numpy(), ref["value"].to_numpy(), rtol=1e-12)
    assert all(got["sorted"].to_list())


@needs_spark
def test_arrays_order_is_independent_of_row_order(hive_catalog) -> None:
    # Spark delivers a group's rows in any order; the kernel input must not depend on it.
    from replay.engines.spark import arrays_from_arrow

    _, tab = hive_catalog
    sub = tab.filter(pc.equal(tab["campaign_id"], "c1"))
    placements = sorted(set(zip(tab["placement"].to_pylist(), tab["pricing"].to_pylist(),
                                strict=True)))
    a = arrays_from_arrow(sub, "c1", placements)
    perm = np.random.default_rng(5).permutation(sub.num_rows)
    b = arrays_from_arrow(sub.take(pa.array(perm)), "c1", placements)
    for name in ("ts_us", "value", "min_win_price", "charge_prob", "placement_code",
                 "first_price"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    # Codes point at the right (placement, pricing) pair.
    rows = sub.take(pc.sort_indices(sub, [("ts", "ascending"), ("request_id", "ascending")]))
    pairs = list(zip(rows["placement"].to_pylist(), rows["pricing"].to_pylist(), strict=True))
    assert [placements[c] for c in a.placement_code] == pairs


@needs_spark
def test_group_too_large_names_campaign_and_rows(spark, hive_catalog) -> None:
    from replay.engines.spark import map_campaign_groups

    root, tab = hive_catalog
    n_c1 = int(pc.sum(pc.equal(tab["campaign_id"], "c1")).as_py())
    n_c2 = int(pc.sum(pc.equal(tab["campaign_id"], "c2")).as_py())

    def fn(key, table):
        return pa.table({"campaign_id": [key]})

    with pytest.raises(UsageError) as err:
        map_campaign_groups(root, fn, spark=spark, max_rows_per_group=n_c2)
    msg = str(err.value)
    assert "'c1'" in msg and f"{n_c1:,} rows" in msg and "\n" not in msg
    # Under the limit the same call goes through.
    out = map_campaign_groups(root, fn, spark=spark, max_rows_per_group=n_c1)
    assert sorted(out["campaign_id"].to_pylist()) == ["c1", "c2", "c3", "c4"]


@needs_spark
def test_error_inside_group_names_campaign(spark, hive_catalog) -> None:
    from replay.engines.spark import map_campaign_groups
    from replay.errors import InputError

    root, _ = hive_catalog

    def fn(key, table):
        if key == "c3":
            raise InputError("budget must be > 0")
        return pa.table({"campaign_id": [key]})

    with pytest.raises(InputError, match=r"campaign 'c3': budget must be > 0"):
        map_campaign_groups(root, fn, spark=spark)


def test_require_spark_message_without_pyspark(monkeypatch) -> None:
    # The local path never needs pyspark; asking for Spark without it gives one line.
    import builtins

    from replay.engines import spark as engine

    real_import = builtins.__import__

    def fake_import(name, *args, **kwargs):
        if name == "pyspark" or name.startswith("pyspark."):
            raise ImportError("No module named 'pyspark'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", fake_import)
    with pytest.raises(UsageError) as err:
        engine.require_spark()
    assert str(err.value) == ("Spark engine needs pyspark: pip install "
                              "'auction-replay[spark]' (and Java 17)")


def test_local_import_does_not_load_pyspark() -> None:
    import subprocess

    code = ("import sys, replay.engines.spark; "
            "print(any(m == 'pyspark' or m.startswith('pyspark.') for m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "False"


# --------------------------------------------------------------------------- real kernels

_HAVE_ENGINES = all(importlib.util.find_spec(m) is not None for m in (
    "replay.scenario", "replay.ingest", "replay.catalog", "replay.analysis.hindsight",
    "replay.engines.local"))


@pytest.fixture(scope="module")
def demo_catalog(tmp_path_factory):
    if not _HAVE_ENGINES:
        pytest.skip("scenario, ingest, hindsight or the local engine is not available")
    from replay.ingest import ingest
    from replay.scenario import generate_scenario

    root = tmp_path_factory.mktemp("demo")
    # 6 campaigns: the first three share one budget (a group), one has a cost cap.
    files = generate_scenario(root / "src", campaigns=6, days=1, seed=7)
    ingest([files.auctions], root / "catalog", campaigns=files.campaigns)
    return root / "catalog"


@needs_spark
def test_hindsight_identical_to_local(spark, demo_catalog) -> None:
    # Reference: the local engine (DuckDB + in-process solve) on the same catalog; the
    # Spark engine must give the very same table, groups and budget curves included.
    from replay.analysis.hindsight import hindsight
    from replay.engines.spark import spark_hindsight

    local = hindsight(demo_catalog, curve="0.5:2:3", workers=1)
    assert local["error"].null_count() == local.height  # a real run, not error rows
    assert (local["members"].list.len() > 1).any()  # the budget group is in it
    got = spark_hindsight(demo_catalog, curve="0.5:2:3", spark=spark)
    assert got.schema == local.schema
    assert got.equals(local)


@needs_spark
def test_hindsight_window_identical_to_local(spark, demo_catalog) -> None:
    from replay.analysis.hindsight import hindsight
    from replay.catalog import Catalog
    from replay.engines.spark import spark_hindsight

    lo, hi = Catalog(demo_catalog).time_span_us()
    start, end = lo + (hi - lo) // 3, lo + (hi - lo) // 2  # inside one day: prunes the other
    local = hindsight(demo_catalog, start=start, end=end, budget_scale=0.5, workers=1)
    got = spark_hindsight(demo_catalog, start=start, end=end, budget_scale=0.5, spark=spark)
    assert got.equals(local)


@needs_spark
def test_hindsight_too_large_group_names_it(spark, demo_catalog) -> None:
    from replay.catalog import Catalog
    from replay.engines.spark import spark_hindsight

    specs = Catalog(demo_catalog).campaigns()
    counts = Catalog(demo_catalog).campaign_row_counts()
    ungrouped = {c: n for c, n in counts.items() if specs[c].group_id is None}
    biggest = max(ungrouped, key=ungrouped.get)
    with pytest.raises(UsageError) as err:
        spark_hindsight(demo_catalog, campaign_ids=[biggest], spark=spark,
                        max_rows_per_group=ungrouped[biggest] - 1)
    assert f"campaign '{biggest}' has {ungrouped[biggest]:,} rows" in str(err.value)


@needs_spark
def test_backtest_identical_to_local(spark, demo_catalog, tmp_path) -> None:
    # Reference: the local engine's backtest (same rule, grid and seed, one process); the
    # Spark run must write the same run store tables.
    from replay.engines.local import backtest
    from replay.engines.spark import spark_backtest
    from replay.runstore import open_run

    args = dict(sweep={"every": ["30min", "2h"]}, seed=5, charges="sampled", train_days=0.5)
    local = backtest(demo_catalog, "dual-mirror", workers=1, out=tmp_path / "local", **args)
    got = spark_backtest(demo_catalog, "dual-mirror", out=tmp_path / "spark", spark=spark,
                         **args)
    assert local.totals.height >= 2 * 5  # every campaign, both settings
    for name in ("totals", "series", "placements", "settings"):
        assert getattr(got, name).equals(getattr(local, name)), name
    a, b = open_run(tmp_path / "local"), open_run(tmp_path / "spark")
    for name in ("totals", "series", "placements", "settings"):
        assert getattr(b, name).equals(getattr(a, name)), name
    assert b.manifest["campaigns"] == a.manifest["campaigns"]
    assert b.manifest.get("skipped") == a.manifest.get("skipped")


def _cli(args, capsys) -> tuple[int, str, str]:
    from replay.cli import main

    try:
        main([str(a) for a in args])
        code = 0
    except SystemExit as exc:
        code = int(exc.code or 0)
    out = capsys.readouterr()
    return code, out.out, out.err


@needs_spark
def test_cli_engine_spark_matches_local(spark, demo_catalog, tmp_path, capsys) -> None:
    # The --engine option end to end: the same JSON from both engines (the active session
    # of the fixture is reused by the command, as under spark-submit).
    import json

    runs = {}
    for engine in ("local", "spark"):
        code, out, err = _cli(["hindsight", demo_catalog, "--json", "--engine", engine],
                              capsys)
        assert code == 0, err
        runs[("hindsight", engine)] = json.loads(out)
        code, out, err = _cli(["backtest", demo_catalog, "--rule", "dual-gradient",
                               "--every", "1h", "--train-days", "0.25", "--json",
                               "--engine", engine, "--out", tmp_path / engine], capsys)
        assert code == 0, err
        runs[("backtest", engine)] = json.loads(out)
    assert runs[("hindsight", "spark")] == runs[("hindsight", "local")]
    assert runs[("backtest", "spark")] == runs[("backtest", "local")]
    assert len(runs[("backtest", "local")]) >= 5
    cid = runs[("backtest", "local")][0]["campaign_id"]
    code, out, err = _cli(["whatif", demo_catalog, "--campaign", cid, "--budget", "50",
                           "--train-days", "0.25", "--json", "--engine", "spark"], capsys)
    assert code == 0, err
    assert json.loads(out)["changed"]["budget"] == 50.0


def test_cli_engine_errors(tmp_path, capsys) -> None:
    # One clear line each, before any work: unknown engine, --master without Spark.
    code, _, err = _cli(["hindsight", tmp_path, "--engine", "cluster"], capsys)
    assert code == 2 and "--engine 'cluster': allowed: local, spark" in err
    code, _, err = _cli(["backtest", tmp_path, "--rule", "ftl", "--out", tmp_path / "r",
                         "--master", "local[2]"], capsys)
    assert code == 2 and "--master 'local[2]': only with --engine spark" in err


@needs_spark
def test_spark_reads_only_committed_ingests_as_the_catalog_does(spark, demo_catalog,
                                                              tmp_path) -> None:
    # A data file whose ingest is not recorded in catalog.json (one caught committing, or
    # crashed there) is left out by Catalog (DEVELOPERS, "Catalog layout"); Spark too.
    from replay.catalog import Catalog
    from replay.engines.spark import read_catalog_frame

    cat = tmp_path / "catalog"
    shutil.copytree(demo_catalog, cat)
    part = sorted((cat / "auctions").glob("*/*.parquet"))[0]
    shutil.copy(part, part.with_name("part-20990101T000000-deadbeef-0.parquet"))
    expected = Catalog(cat).row_count()
    assert expected == Catalog(demo_catalog).row_count()
    assert read_catalog_frame(spark, cat, ["campaign_id"]).count() == expected
    # a bare folder in the catalog's layout, without catalog.json: every file counts
    (cat / "catalog.json").unlink()
    extra = pq.read_metadata(part).num_rows
    assert read_catalog_frame(spark, cat, ["campaign_id"]).count() == expected + extra
