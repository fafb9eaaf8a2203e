"""Spark engine: the same per-campaign kernels as the local engine, run on a Spark cluster.

Spark reads the catalog's Parquet files (hive partitions ``date=YYYY-MM-DD``, pruned to the
window), groups the rows by campaign (or by budget group), and hands each group to the SAME
pure per-campaign functions the local engine runs in its process pool, as one Arrow table
(``groupBy().applyInArrow``; ``applyInPandas`` on pyspark 3.5). Each group's result tables
travel back to the driver as Arrow IPC bytes, so the driver rebuilds exactly the tables the
local engine produces.

Memory: one task holds one whole group. Before any data is shipped the engine counts the
rows of every group (a cheap aggregation) and refuses a group larger than
``max_rows_per_group`` with a message naming it, instead of letting an executor die.

pyspark is optional: nothing here imports it at module import time (the local path imports
this module freely); :func:`require_spark` explains how to install it.
"""

from __future__ import annotations

import io
import os
import pickle
import sys
import traceback
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from replay.errors import InputError, ReplayError, UsageError
from replay.schema import (
    FIRST_PRICE,
    PARTITION_COLUMN,
    CampaignArrays,
    CampaignSpec,
)

#: Default Spark master when none is given and the program was not started by spark-submit.
DEFAULT_MASTER = "local[2]"

#: Estimated peak Python-worker memory per auction row of a group, in bytes: the Arrow
#: batches Spark sends, their concatenation, the sorted copy, the CampaignArrays and the
#: kernels' scratch arrays (sort order, ratios, cumulative sums). Peak RSS of hindsight on
#: one 2M-row group measured about 275 bytes per row; 400 leaves room for the replay loop.
BYTES_PER_ROW = 400

#: Share of the executor's Python memory one group may use (the rest: interpreter, numba,
#: Spark's own buffers).
MEMORY_SHARE = 0.5

INSTALL_HINT = "Spark engine needs pyspark: pip install 'auction-replay[spark]' (and Java 17)"

# Columns of the UDF output: one row per (group, result table).
_OUT_SCHEMA = "group_key string, name string, payload binary"
_ERROR_NAME = "__error__"
_SINGLE_NAME = "__table__"

# Catalog columns the kernels' input needs (``ts`` travels as int64 microseconds ``ts_us``).
ARRAY_COLUMNS: tuple[str, ...] = (
    "ts", "campaign_id", "placement", "pricing", "value", "min_win_price", "charge_prob",
    "request_id",
)


def require_spark() -> Any:
    """Import and return the ``pyspark`` module, or raise one clear UsageError line."""
    try:
        import pyspark  # noqa: PLC0415  (optional dependency, imported on demand)
    except ImportError:
        raise UsageError(INSTALL_HINT) from None
    import shutil

    if not (os.environ.get("JAVA_HOME") or shutil.which("java")):
        raise UsageError(INSTALL_HINT + "; no java found on PATH and JAVA_HOME is not set")
    return pyspark


def _under_spark_submit() -> bool:
    # spark-submit starts the JVM first and tells the Python driver its gateway port.
    return "PYSPARK_GATEWAY_PORT" in os.environ


def get_session(master: str | None = DEFAULT_MASTER, app_name: str = "auction-replay",
                conf: Mapping[str, str] | None = None) -> Any:
    """The active SparkSession, or a new one on ``master``.

    An already active session (a test fixture, a notebook, spark-submit) is reused as it is,
    so under spark-submit its ``--master`` and ``--conf`` win over ``master``. A new local
    session is kept small: UI off, few shuffle partitions, 1 GiB driver.
    """
    require_spark()
    from pyspark.sql import SparkSession

    active = SparkSession.getActiveSession()
    if active is not None:
        return active
    builder = SparkSession.builder.appName(app_name)
    if not _under_spark_submit():
        master = master or DEFAULT_MASTER
        builder = builder.master(master)
        if master.startswith("local"):
            # Local workers must run this very interpreter (the one with numpy, numba and
            # this package); on a cluster the executors' own Python is configured by the user.
            os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
            builder = (builder.config("spark.driver.memory", "1g")
                       .config("spark.ui.enabled", "false")
                       .config("spark.ui.showConsoleProgress", "false")
                       .config("spark.sql.shuffle.partitions", "4"))
    builder = builder.config("spark.sql.session.timeZone", "UTC")
    for key, val in (conf or {}).items():
        builder = builder.config(key, val)
    session = builder.getOrCreate()
    session.sparkContext.setLogLevel("ERROR")
    return session


def _parse_bytes(text: str) -> int:
    """Spark memory string ('1g', '512m', '2048k', '1073741824') to bytes."""
    units = {"k": 1 << 10, "m": 1 << 20, "g": 1 << 30, "t": 1 << 40}
    s = text.strip().lower().removesuffix("b")
    if s and s[-1] in units:
        return int(float(s[:-1]) * units[s[-1]])
    return int(s) if s else 0


def default_max_rows(spark: Any) -> tuple[int, str]:
    """Largest group (rows) one task may hold, and the setting it was derived from.

    Uses ``spark.executor.pyspark.memory`` when set (the Python worker's own limit), else
    ``spark.executor.memory`` (else ``spark.driver.memory`` in local mode, where the
    driver is the executor), times :data:`MEMORY_SHARE`, over :data:`BYTES_PER_ROW`.
    """
    conf = spark.sparkContext.getConf()
    local = spark.sparkContext.master.startswith("local")
    keys = ["spark.executor.pyspark.memory", "spark.executor.memory"]
    if local:
        keys.insert(1, "spark.driver.memory")
    for key in keys:
        if conf.contains(key):
            text = conf.get(key)
            break
    else:
        key, text = "spark.executor.memory", "1g"
    rows = int(_parse_bytes(text) * MEMORY_SHARE / BYTES_PER_ROW)
    return max(rows, 1), f"{key}={text}"


# --------------------------------------------------------------------------- conversion


def placement_keys(placements: Sequence[tuple[str, str]]) -> list[str]:
    """One string per (placement, pricing) pair, for vectorized lookups."""
    return [f"{p}\x1f{r}" for p, r in placements]


def arrays_from_arrow(table: pa.Table, campaign_id: str,
                      placements: Sequence[tuple[str, str]]) -> CampaignArrays:
    """One campaign's rows (Arrow, any order) as kernel input, sorted by time.

    ``placements`` is the catalog-wide sorted list of (placement, pricing) pairs; the codes
    index into it, exactly as ``Catalog.arrays`` does. Ties in time are broken by the other
    columns so the order never depends on how Spark shuffled the rows.
    """
    if "ts_us" not in table.column_names:
        table = table.append_column(
            "ts_us", pc.cast(pc.cast(table["ts"], pa.timestamp("us", tz="UTC")), pa.int64()))
    order_cols = [c for c in ("ts_us", "request_id", "placement", "pricing", "value",
                              "min_win_price", "charge_prob") if c in table.column_names]
    table = table.take(pc.sort_indices(table, sort_keys=[(c, "ascending") for c in order_cols]))
    keys = pc.binary_join_element_wise(table["placement"], table["pricing"], "\x1f")
    code = pc.index_in(keys, value_set=pa.array(placement_keys(placements), pa.string()))
    if code.null_count:
        missing = table.filter(pc.is_null(code)).slice(0, 1)
        raise InputError(
            f"campaign {campaign_id!r}: placement {missing['placement'][0].as_py()!r} "
            f"({missing['pricing'][0].as_py()}) is not in the catalog's placement list")
    charge = (pc.fill_null(table["charge_prob"], 1.0) if "charge_prob" in table.column_names
              else pa.array(np.ones(table.num_rows)))
    rid = None  # as Catalog.arrays: None when the log has no request ids
    if "request_id" in table.column_names and table["request_id"].null_count < table.num_rows:
        rid = np.asarray(table["request_id"].to_pylist(), dtype=object)

    def f64(col: Any) -> np.ndarray:
        return np.ascontiguousarray(pc.cast(col, pa.float64()).to_numpy(zero_copy_only=False))

    return CampaignArrays(
        campaign_id=campaign_id,
        ts_us=np.ascontiguousarray(table["ts_us"].to_numpy(zero_copy_only=False),
                                   dtype=np.int64),
        value=f64(table["value"]),
        min_win_price=f64(table["min_win_price"]),
        charge_prob=f64(charge),
        placement_code=np.ascontiguousarray(code.to_numpy(zero_copy_only=False),
                                            dtype=np.int32),
        first_price=np.ascontiguousarray(
            pc.equal(table["pricing"], FIRST_PRICE).to_numpy(zero_copy_only=False), dtype=bool),
        placements=tuple(p for p, _ in placements),
        request_id=rid,
    )


def _ipc_bytes(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()


def _ipc_table(payload: bytes) -> pa.Table:
    return pa.ipc.open_stream(pa.py_buffer(payload)).read_all()


# --------------------------------------------------------------------------- group mapping


@dataclass(frozen=True)
class GroupError:
    """A failure inside one group's task, carried back to the driver (not a traceback)."""

    group_key: str
    kind: str
    message: str
    detail: str
    exc: bytes | None  # pickled ReplayError, re-raised as is on the driver


def _group_runner(fn: Callable[[str, pa.Table], pa.Table | Mapping[str, pa.Table]],
                  key_column: str) -> Callable[[Any, pa.Table], pa.Table]:
    """Wrap ``fn`` into an applyInArrow function: (key tuple, group table) -> output rows."""

    def run(key: Any, table: pa.Table) -> pa.Table:
        group_key = key[0].as_py() if hasattr(key[0], "as_py") else key[0]
        names: list[str] = []
        payloads: list[bytes] = []
        try:
            out = fn(group_key, table)
            if isinstance(out, pa.Table):
                out = {_SINGLE_NAME: out}
            for name, tbl in out.items():
                names.append(name)
                payloads.append(_ipc_bytes(tbl))
        except Exception as exc:  # carried to the driver with the group named
            picklable = None
            if isinstance(exc, ReplayError):
                try:
                    picklable = pickle.dumps(exc)
                except Exception:
                    picklable = None
            err = GroupError(group_key, type(exc).__name__, str(exc), traceback.format_exc(),
                             picklable)
            names, payloads = [_ERROR_NAME], [pickle.dumps(err)]
        return pa.table({"group_key": pa.array([group_key] * len(names), pa.string()),
                         "name": pa.array(names, pa.string()),
                         "payload": pa.array(payloads, pa.binary())})

    return run


def _date_bounds(start_us: int | None, end_us: int | None) -> tuple[Any, Any]:
    """UTC dates of the first and last partition the window [start, end) can touch."""
    def day(us: int) -> Any:
        return (datetime(1970, 1, 1, tzinfo=UTC) + timedelta(microseconds=us)).date()
    lo = None if start_us is None else day(start_us)
    hi = None if end_us is None else day(end_us - 1)
    return lo, hi


def read_catalog_frame(spark: Any, catalog_path: str | Path, columns: Sequence[str],
                       window: tuple[int | None, int | None] = (None, None)) -> Any:
    """The catalog's auctions as a Spark DataFrame with ``ts_us`` (int64 µs), windowed.

    Filters on the ``date`` partition column first (partition pruning), then on ``ts``.
    """
    from pyspark.sql import functions as F  # noqa: N812

    root = str(catalog_path).rstrip("/")
    auctions = f"{root}/auctions"
    if "://" not in root and not Path(auctions).is_dir():
        raise InputError(f"{root}: not a catalog (no auctions/ folder); run `replay ingest`")
    df = spark.read.option("basePath", auctions).parquet(auctions)
    meta = _catalog_meta(spark, root)
    if meta is not None:
        # As Catalog does: only files of ingests recorded in catalog.json.
        from replay.ingest import is_recorded, recorded_ingests

        recorded = recorded_ingests(meta)
        files = df.inputFiles()
        keep = [f for f in files if is_recorded(f.rsplit("/", 1)[-1], recorded)]
        if len(keep) < len(files):
            df = (spark.read.option("basePath", auctions).parquet(*keep) if keep
                  else df.limit(0))
    start_us, end_us = window
    lo, hi = _date_bounds(start_us, end_us)
    if lo is not None:
        df = df.where(F.col(PARTITION_COLUMN) >= F.lit(lo))
    if hi is not None:
        df = df.where(F.col(PARTITION_COLUMN) <= F.lit(hi))
    df = df.withColumn("ts_us", F.unix_micros(F.col("ts")))
    if start_us is not None:
        df = df.where(F.col("ts_us") >= F.lit(int(start_us)))
    if end_us is not None:
        df = df.where(F.col("ts_us") < F.lit(int(end_us)))
    wanted = ["ts_us"] + [c for c in columns if c not in ("ts", "ts_us")]
    present = set(df.columns)
    missing = [c for c in wanted if c not in present]
    if missing:
        raise InputError(f"{auctions}: catalog has no column(s) {', '.join(missing)}")
    return df.select(*wanted)


def _catalog_meta(spark: Any, root: str) -> dict | None:
    """The catalog's ``catalog.json``; None without one (a bare folder in the catalog's
    layout: every file counts)."""
    import json

    from replay.ingest import CATALOG_JSON, read_catalog_json

    if "://" not in root:
        return read_catalog_json(Path(root))
    try:
        rows = spark.read.text(f"{root}/{CATALOG_JSON}", wholetext=True).collect()
    except Exception:  # noqa: BLE001 - Spark raises its own types for a missing path
        return None
    return json.loads(rows[0][0]) if rows else None


def catalog_placements(spark: Any, catalog_path: str | Path) -> list[tuple[str, str]]:
    """The catalog-wide sorted (placement, pricing) list, computed by Spark."""
    df = read_catalog_frame(spark, catalog_path, ["placement", "pricing"])
    rows = df.select("placement", "pricing").distinct().collect()
    return sorted((r["placement"], r["pricing"]) for r in rows)


def _to_arrow(df: Any) -> pa.Table:
    if hasattr(df, "toArrow"):  # pyspark >= 4.0
        return df.toArrow()
    rows = df.collect()  # pyspark 3.5
    return pa.Table.from_pylist([r.asDict() for r in rows])


def map_campaign_groups(
    catalog_path: str | Path,
    fn: Callable[[str, pa.Table], pa.Table | Mapping[str, pa.Table]],
    *,
    key_column: str = "campaign_id",
    columns: Sequence[str] = ARRAY_COLUMNS,
    window: tuple[int | None, int | None] = (None, None),
    master: str | None = DEFAULT_MASTER,
    max_rows_per_group: int | None = None,
    groups: Sequence[str] | None = None,
    campaign_groups: Mapping[str, str] | None = None,
    campaign_windows: Mapping[str, tuple[int | None, int | None]] | None = None,
    per_group: bool = False,
    label: Callable[[str], str] | None = None,
    spark: Any = None,
) -> Any:
    """Run ``fn(group_key, rows_of_that_group)`` on Spark, once per group, and collect.

    ``key_column`` is ``"campaign_id"`` or the name of a column produced from
    ``campaign_groups`` (campaign id -> group key, e.g. ``group_id`` with ungrouped
    campaigns as their own group), which is joined onto the rows. ``columns`` are catalog
    columns to ship (``ts`` arrives as ``ts_us``, int64 microseconds UTC); ``window`` is
    ``[start_us, end_us)``. ``groups`` restricts the run to those keys.
    ``campaign_windows`` (campaign id -> ``[lo, hi)`` microseconds, None = open) keeps only
    those campaigns, each cut to its own window, inside Spark (so counts are exact).

    ``fn`` returns a pyarrow Table, or a dict of named Tables; the result is the matching
    Table (or dict of Tables), each concatenated over the groups in sorted key order. With
    ``per_group`` the result is ``{group_key: {name: Table}}`` instead (a single Table
    result under the name ``"table"``). ``label(key)`` names a group in messages
    (default ``campaign 'ID'``).
    Raises UsageError naming the group and its row count when a group exceeds
    ``max_rows_per_group`` (default :func:`default_max_rows`), before any row is shipped,
    and re-raises a group's ReplayError with the group named.
    """
    from pyspark.sql import functions as F  # noqa: N812

    spark = spark or get_session(master)
    df = read_catalog_frame(spark, catalog_path, columns, window)
    if key_column != "campaign_id":
        if campaign_groups is None:
            raise UsageError(f"key_column {key_column!r} needs campaign_groups "
                             "(campaign id -> group key)")
        mapping = spark.createDataFrame(
            [(c, g) for c, g in campaign_groups.items()],
            f"campaign_id string, {key_column} string")
        df = df.join(F.broadcast(mapping), on="campaign_id", how="inner")
    if campaign_windows is not None:
        lo_min, hi_max = -(2**63), 2**63 - 1
        bounds = spark.createDataFrame(
            [(c, lo_min if lo is None else int(lo), hi_max if hi is None else int(hi))
             for c, (lo, hi) in campaign_windows.items()],
            "campaign_id string, _lo long, _hi long")
        df = (df.join(F.broadcast(bounds), on="campaign_id", how="inner")
              .where((F.col("ts_us") >= F.col("_lo")) & (F.col("ts_us") < F.col("_hi")))
              .drop("_lo", "_hi"))
    if groups is not None:
        df = df.where(F.col(key_column).isin(list(groups)))

    what = "campaign" if key_column == "campaign_id" else key_column

    def name(key: str) -> str:
        return label(key) if label is not None else f"{what} {key!r}"

    # Cheap aggregation first: a group too large for one task fails here, by name.
    counts = {r[0]: int(r[1]) for r in df.groupBy(key_column).count().collect()}
    if max_rows_per_group is None:
        limit, source = default_max_rows(spark)
    else:
        limit, source = int(max_rows_per_group), "max_rows_per_group"
    too_big = sorted(((n, k) for k, n in counts.items() if n > limit), reverse=True)
    if too_big:
        n, k = too_big[0]
        more = f" (and {len(too_big) - 1} more)" if len(too_big) > 1 else ""
        raise UsageError(
            f"{name(k)} has {n:,} rows in the window, more than the {limit:,} one Spark "
            f"task may hold ({source}){more}; give executors more memory "
            "(spark.executor.pyspark.memory), narrow the window, or raise max_rows_per_group")
    if not counts:
        return {} if per_group else pa.table({})

    run = _group_runner(fn, key_column)
    grouped = df.groupBy(key_column)
    if hasattr(grouped, "applyInArrow"):  # pyspark >= 4.0
        out = grouped.applyInArrow(run, _OUT_SCHEMA)
    else:
        import pandas as pd

        def run_pandas(key: Any, pdf: Any) -> Any:
            table = pa.Table.from_pandas(pdf, preserve_index=False)
            return run((pa.scalar(key[0]),), table).to_pandas()

        _ = pd  # applyInPandas needs pandas on the workers too
        out = grouped.applyInPandas(run_pandas, _OUT_SCHEMA)
    collected = _to_arrow(out)
    return _assemble(collected, name, per_group)


def _assemble(collected: pa.Table, name: Callable[[str], str], per_group: bool = False) -> Any:
    rows = collected.to_pylist()
    rows.sort(key=lambda r: (r["group_key"], r["name"]))
    errors = [pickle.loads(r["payload"]) for r in rows if r["name"] == _ERROR_NAME]
    if errors:
        err: GroupError = errors[0]
        who = name(err.group_key)
        if err.exc is not None:
            exc = pickle.loads(err.exc)
            if str(err.group_key) not in str(exc):
                raise type(exc)(f"{who}: {exc}")
            raise exc
        raise RuntimeError(f"{who} failed on Spark with {err.kind}: {err.message}\n"
                           f"{err.detail}")
    if per_group:
        out: dict[str, dict[str, pa.Table]] = {}
        for r in rows:
            name = "table" if r["name"] == _SINGLE_NAME else r["name"]
            out.setdefault(r["group_key"], {})[name] = _ipc_table(r["payload"])
        return out
    parts: dict[str, list[pa.Table]] = {}
    for r in rows:
        parts.setdefault(r["name"], []).append(_ipc_table(r["payload"]))
    tables = {name: pa.concat_tables(ts, promote_options="permissive")
              for name, ts in parts.items()}
    if set(tables) == {_SINGLE_NAME}:
        return tables[_SINGLE_NAME]
    return tables


def group_row_counts(catalog_path: str | Path, *, window: tuple[int | None, int | None] = (None,
                     None), master: str | None = DEFAULT_MASTER, spark: Any = None
                     ) -> dict[str, int]:
    """Rows per campaign in the window, counted by Spark (what the size check uses)."""
    spark = spark or get_session(master)
    df = read_catalog_frame(spark, catalog_path, ["campaign_id"], window)
    return {r[0]: int(r[1]) for r in df.groupBy("campaign_id").count().collect()}


# --------------------------------------------------------------------------- hindsight


def _empty_table(columns: Sequence[str]) -> pa.Table:
    types = {"ts_us": pa.int64(), "value": pa.float64(), "min_win_price": pa.float64(),
             "charge_prob": pa.float64()}
    return pa.table({c: pa.array([], types.get(c, pa.string())) for c in columns})


def _members_arrays(table: pa.Table, members: Sequence[str],
                    placements: Sequence[tuple[str, str]]) -> dict[str, CampaignArrays]:
    """Split one group's rows by campaign (members without rows get empty arrays)."""
    out = {}
    ids = table["campaign_id"]
    for m in members:
        sub = table.filter(pc.equal(ids, m)) if table.num_rows else table
        out[m] = arrays_from_arrow(sub, m, placements)
    return out


def spark_hindsight(source: Any, campaign_ids: Sequence[str] | None = None, start: Any = None,
                    end: Any = None, budget_scale: float = 1.0, curve: Any = None,
                    workers: int | None = None, progress: bool = False, *,
                    budget: float | None = None, max_cost_per_result: float | None = None,
                    master: str = DEFAULT_MASTER, max_rows_per_group: int | None = None,
                    spark: Any = None) -> Any:
    """:func:`replay.analysis.hindsight.hindsight` with Spark doing the per-unit work.

    Same arguments and the same polars DataFrame (one row per campaign or group, same
    order). Each unit (a campaign, or a budget group with all its members) is one Spark
    group handed to ``solve_campaign_arrays``. ``workers``/``progress`` are accepted for
    symmetry and ignored (Spark decides the parallelism). CampaignArrays in memory are
    solved locally (nothing to distribute).
    """
    from replay.analysis import hindsight as hs
    from replay.catalog import Catalog, to_us

    if isinstance(source, CampaignArrays):
        return hs.hindsight(source, start=start, end=end, budget_scale=budget_scale,
                            curve=curve, workers=1, budget=budget,
                            max_cost_per_result=max_cost_per_result)
    if isinstance(curve, str):
        curve = hs.CurveSpec.parse(curve)
    start_us, end_us = to_us(start), to_us(end)
    catalog = source if isinstance(source, Catalog) else Catalog(Path(source))
    units = hs._plan_units(catalog, campaign_ids)
    placements = catalog.placements()
    rows: dict[str, dict[str, Any]] = {}
    unit_of: dict[str, str] = {}
    windows: dict[str, tuple[int | None, int | None]] = {}
    by_id = {}
    for u in units:
        if u.specs[0] is None:  # same row as the local engine, no data needed
            rows[u.unit_id] = hs._error_row(
                u.unit_id, u.members, None, f"campaign {u.unit_id}: not in the campaign "
                "table, so it has no budget (add it to campaigns.parquet)")
            continue
        by_id[u.unit_id] = u
        for s in u.specs:
            unit_of[s.campaign_id] = u.unit_id
            windows[s.campaign_id] = hs._window(start_us, end_us, s)

    def solve_unit(unit_id: str, table: pa.Table) -> dict[str, Any]:
        u = by_id[unit_id]
        arrays = _members_arrays(table, u.members, placements)
        if u.is_group:
            bad = [s.campaign_id for s in u.specs
                   if s.budget is None or not np.isfinite(s.budget) or s.budget <= 0]
            if bad:
                return hs._error_row(u.unit_id, u.members, None,
                                     f"group {u.unit_id}: budget of member(s) "
                                     f"{', '.join(bad)} must be a positive number")
            spec = CampaignSpec(u.unit_id, float(sum(s.budget for s in u.specs)))
            return hs.solve_campaign_arrays([arrays[m] for m in u.members], spec,
                                            budget_scale=budget_scale, curve=curve)
        spec = u.specs[0]
        return hs.solve_campaign_arrays(arrays[spec.campaign_id], spec,
                                        budget_scale=budget_scale, curve=curve,
                                        start_us=start_us, end_us=end_us)

    def fn(unit_id: str, table: pa.Table) -> pa.Table:
        return hs._frame([solve_unit(unit_id, table)], curve is not None).to_arrow()

    if by_id:
        spark = spark or get_session(master)
        # A unit id doubles as the group key: group_id for groups, campaign_id otherwise.
        out = map_campaign_groups(
            catalog.path, fn, key_column="unit_id", columns=list(ARRAY_COLUMNS),
            window=(start_us, end_us), master=master, max_rows_per_group=max_rows_per_group,
            campaign_groups=unit_of, campaign_windows=windows, spark=spark,
            label=lambda k: f"{'group' if by_id[k].is_group else 'campaign'} {k!r}")
        if out.num_rows:
            import polars as pl

            for r in pl.from_arrow(out).to_dicts():
                rows[r["campaign_id"]] = r
        empty = _empty_table(["ts_us", *ARRAY_COLUMNS[1:]])
        for uid in by_id:
            if uid not in rows:  # no rows in the window: the local engine's error row
                rows[uid] = solve_unit(uid, empty)
    return hs._frame([rows[u.unit_id] for u in units], curve is not None)


# --------------------------------------------------------------------------- backtest


def run_campaigns_on_spark(job: Any, specs: Sequence[CampaignSpec],
                           handle: Callable[[Any], None], *, master: str = DEFAULT_MASTER,
                           max_rows_per_group: int | None = None, spark: Any = None) -> None:
    """The local engine's per-campaign tasks (``replay.engines.local.run_campaign``) on Spark.

    ``job`` is the local engine's ``Job``; every campaign's rows (its training and replay
    windows) form one Spark group; ``handle(CampaignResult)`` is called on the driver for
    each campaign, exactly as the process pool does, so the run store and the returned
    tables are the same. This is the hook ``backtest(..., engine="spark")`` calls.
    """
    import polars as pl

    from replay.engines import local
    from replay.engines.windows import campaign_window

    placements = list(job.placements)
    spec_of = {s.campaign_id: s for s in specs}
    windows: dict[str, tuple[int | None, int | None]] = {}
    for s in specs:
        cw = campaign_window(job.windows, s)
        if cw.empty:  # skipped without data, as in the local engine
            handle(local.run_campaign(local._empty_arrays(s.campaign_id), s, job))
            continue
        windows[s.campaign_id] = (min(cw.train_start_us, cw.start_us), cw.end_us)
    if not windows:
        return

    def fn(cid: str, table: pa.Table) -> dict[str, pa.Table]:
        res = local.run_campaign(arrays_from_arrow(table, cid, placements), spec_of[cid], job)
        out = {name: df.to_arrow() for name, df in res.tables.items()}
        out["_skipped"] = pa.table({"skipped": pa.array([res.skipped], pa.string())})
        return out

    lo = min(w[0] for w in windows.values())
    hi = max(w[1] for w in windows.values())
    results = map_campaign_groups(
        job.catalog_path, fn, columns=list(ARRAY_COLUMNS), window=(lo, hi), master=master,
        max_rows_per_group=max_rows_per_group, campaign_windows=windows, per_group=True,
        spark=spark)
    for cid in sorted(windows):
        part = results.get(cid)
        if part is None:  # no row in its windows: the local engine's "no logged auctions"
            handle(local.run_campaign(local._empty_arrays(cid), spec_of[cid], job))
            continue
        skipped = part.pop("_skipped")["skipped"][0].as_py()
        tables = {name: pl.from_arrow(t) for name, t in part.items()}
        handle(local.CampaignResult(cid, tables, skipped))


def spark_backtest(catalog: Any, rule: Any, params: Mapping[str, Any] | None = None, *,
                   master: str | None = DEFAULT_MASTER, max_rows_per_group: int | None = None,
                   spark: Any = None, **kwargs: Any) -> Any:
    """``replay.engines.local.backtest`` with the per-campaign tasks run on Spark.

    Same keyword arguments as the local ``backtest`` (``campaigns``, ``start``, ``end``,
    ``train_days``, ``every``, ``every_n``, ``charges``, ``seed``, ``out``, ``sweep``,
    ``resume``, ``budget_scale``, ``shading``, ...; ``workers`` is ignored) plus ``master``;
    returns the same BacktestResult and writes the same run store. Validation, windows,
    the manifest, the store and the group optima stay on the driver (the local engine's
    code); the per-campaign work moves to Spark through the local engine's ``runner`` hook.
    """
    from replay.engines import local

    require_spark()
    kwargs.pop("workers", None)

    def runner(job: Any, specs: Sequence[CampaignSpec],
               handle: Callable[[Any], None]) -> None:
        if specs:
            run_campaigns_on_spark(job, specs, handle, master=master or DEFAULT_MASTER,
                                   max_rows_per_group=max_rows_per_group, spark=spark)

    return local.backtest(catalog, rule, params, runner=runner, **kwargs)


def spark_whatif(catalog: Any, campaign_id: str, *, master: str = DEFAULT_MASTER,
                 **kwargs: Any) -> Any:
    """``replay.engines.local.whatif``: one campaign, so it runs on the driver.

    A what-if replays a single campaign twice; its rows fit one machine by the same bound
    that limits a Spark task, so shipping them to an executor would only add latency.
    ``master`` is accepted so ``--engine spark`` works on every command.
    """
    from replay.engines import local

    _ = master
    return local.whatif(catalog, campaign_id, **kwargs)
