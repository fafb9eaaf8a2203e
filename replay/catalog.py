"""Read access to a catalog written by :func:`replay.ingest.ingest`.

DuckDB views over the catalog's Parquet files: ``auctions`` (hive partitions
``auctions/date=YYYY-MM-DD``), ``campaigns`` and ``rejected``. A :class:`Catalog` reads
the data files of the ingests recorded in ``catalog.json`` when it was opened (a snapshot:
an ingest committing meanwhile is not seen half-done, and not at all by this instance).
Each thread of each process opens its own DuckDB connection, so a :class:`Catalog` can be
pickled into worker processes (its path and snapshot travel).
"""

from __future__ import annotations

import hashlib
import os
import threading
import time
from collections.abc import Iterator, Sequence
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from replay.errors import InputError, UsageError
from replay.ingest import (
    CAMPAIGNS_FILE,
    CATALOG_JSON,
    committed_files,
    connect_duckdb,
    read_catalog_json,
    sql_file_list,
)
from replay.schema import (
    AUCTION_COLUMNS,
    CAMPAIGN_SCHEMA,
    FIRST_PRICE,
    PARTITION_COLUMN,
    REJECT_REASON_COLUMN,
    CampaignArrays,
    CampaignSpec,
    to_us,
)

#: iter_arrays reads campaigns in batches of about this many rows (memory bound).
ITER_BATCH_ROWS = 4_000_000


def _np(col: pa.ChunkedArray | pa.Array, dtype: type) -> np.ndarray:
    """numpy view of an Arrow column: zero-copy for a single null-free chunk."""
    if isinstance(col, pa.ChunkedArray):
        col = col.chunk(0) if col.num_chunks == 1 else col.combine_chunks()
    if col.null_count == 0 and not pa.types.is_boolean(col.type):
        arr = col.to_numpy(zero_copy_only=True)
    else:
        arr = col.to_numpy(zero_copy_only=False)
    return arr if arr.dtype == dtype else arr.astype(dtype)


class Catalog:
    """A catalog folder: ``catalog.json``, ``auctions/``, ``campaigns.parquet``, ``_rejected/``."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        if not self.path.is_dir():
            raise InputError(f"{self.path}: no such catalog folder (create one with "
                             "`replay ingest SRC --into CATALOG`)")
        meta, data = self._read_snapshot()
        self.meta = meta
        self._auction_files, self._rejected_files = committed_files(self.path, meta)
        # The campaign table is small (one row per campaign): held in memory, so budgets
        # stay those of the snapshot too.
        self._campaign_table: pa.Table | None = None if data is None else \
            pq.read_table(pa.BufferReader(data))
        self._campaign_sha = None if data is None else hashlib.sha256(data).digest()
        self._local = threading.local()
        self._cache: dict[str, object] = {}

    #: Reads of catalog.json and the campaign table that may meet an ingest's commit
    #: half-way (it replaces the table, then catalog.json) before giving up.
    SNAPSHOT_ATTEMPTS = 20

    def _read_snapshot(self) -> tuple[dict, bytes | None]:
        """``(catalog.json, campaign table bytes)`` of one ingest: read again while the
        table does not match the digest catalog.json records (an ingest committing in
        between). Catalogs written before the digest was recorded are read as they are."""
        table_path = self.path / CAMPAIGNS_FILE
        for attempt in range(self.SNAPSHOT_ATTEMPTS):
            meta = read_catalog_json(self.path)
            if meta is None:
                raise InputError(f"{self.path}: not a catalog (no {CATALOG_JSON}); create one "
                                 "with `replay ingest SRC --into CATALOG`")
            data = table_path.read_bytes() if table_path.is_file() else None
            want = meta.get("campaigns_sha256")
            got = None if data is None else hashlib.sha256(data).hexdigest()
            if want is None or got == want:
                return meta, data
            time.sleep(0.01 * (attempt + 1))
        raise InputError(f"{table_path}: does not match the campaign table {CATALOG_JSON} "
                         "records (changed outside `replay ingest`?); ingest the campaign "
                         "table again with `replay ingest SRC --into CATALOG --campaigns FILE`")

    # -- pickling: the path and the snapshot (metadata, file lists, campaign table) cross
    # processes, so every worker reads what the parent read even if an ingest commits
    def __getstate__(self) -> dict:
        return {"path": str(self.path), "meta": self.meta,
                "files": (self._auction_files, self._rejected_files),
                "campaign_table": (self._campaign_table, self._campaign_sha)}

    def __setstate__(self, state: dict) -> None:
        self.path = Path(state["path"])
        self.meta = state["meta"]
        self._auction_files, self._rejected_files = state["files"]
        self._campaign_table, self._campaign_sha = state["campaign_table"]
        self._local = threading.local()
        self._cache = {}

    def __repr__(self) -> str:
        return f"Catalog({str(self.path)!r})"

    # -- connection
    @property
    def con(self) -> duckdb.DuckDBPyConnection:
        """This thread's DuckDB connection (opened on first use, one per thread and process)."""
        pid = os.getpid()
        con = getattr(self._local, "con", None)
        if con is None or getattr(self._local, "pid", None) != pid:
            con = connect_duckdb()
            self._create_views(con)
            self._local.con, self._local.pid = con, pid
        return con

    def _create_views(self, con: duckdb.DuckDBPyConnection) -> None:
        if self._auction_files:
            con.execute(
                "CREATE OR REPLACE VIEW auctions AS SELECT * FROM read_parquet("
                f"{sql_file_list(self.path, self._auction_files)}, hive_partitioning = true, "
                f"hive_types = {{'{PARTITION_COLUMN}': DATE}})")
        else:
            cols = ", ".join(f"CAST(NULL AS {_duck_type(c.type)}) AS {c.name}"
                             for c in AUCTION_COLUMNS)
            con.execute(f"CREATE OR REPLACE VIEW auctions AS SELECT {cols}, "
                        f"CAST(NULL AS DATE) AS {PARTITION_COLUMN} WHERE false")
        if self._campaign_table is not None:
            con.register("__campaign_table", self._campaign_table)
            con.execute("CREATE OR REPLACE VIEW campaigns AS SELECT * FROM __campaign_table")
        else:
            cols = ", ".join(f"CAST(NULL AS {_duck_type(f.type)}) AS \"{f.name}\""
                             for f in CAMPAIGN_SCHEMA)
            con.execute(f"CREATE OR REPLACE VIEW campaigns AS SELECT {cols} WHERE false")
        if self._rejected_files:
            con.execute("CREATE OR REPLACE VIEW rejected AS SELECT * FROM read_parquet("
                        f"{sql_file_list(self.path, self._rejected_files)}, "
                        "union_by_name = true)")
        else:
            con.execute("CREATE OR REPLACE VIEW rejected AS SELECT "
                        f"CAST(NULL AS VARCHAR) AS {REJECT_REASON_COLUMN}, "
                        "CAST(NULL AS VARCHAR) AS source_file, "
                        "CAST(NULL AS BIGINT) AS source_row WHERE false")

    # -- SQL
    def sql(self, query: str) -> pl.DataFrame:
        """Run DuckDB SQL over the views ``auctions``, ``campaigns``, ``rejected``."""
        return pl.from_arrow(self.arrow(query))

    def arrow(self, query: str) -> pa.Table:
        """Like :meth:`sql`, as an Arrow table. Bad SQL raises UsageError (one line)."""
        try:
            rel = self.con.sql(query)
            if rel is None:
                return pa.table({})
            return rel.to_arrow_table()
        except duckdb.Error as exc:
            text = str(exc).strip().splitlines()
            raise UsageError(f"query failed: {text[0] if text else type(exc).__name__}")\
                from None

    def _where(self, campaign_id, start, end) -> tuple[str, list]:
        conds, params = [], []
        if campaign_id is not None:
            ids = [campaign_id] if isinstance(campaign_id, str) else list(campaign_id)
            conds.append("campaign_id IN (SELECT unnest(?))")
            params.append(ids)
        s, e = to_us(start), to_us(end)
        if s is not None:
            conds.append("ts >= make_timestamptz(?)")
            params.append(s)
            # Partition pruning on the hive date column.
            conds.append(f"{PARTITION_COLUMN} >= CAST(make_timestamptz(?) AS DATE)")
            params.append(s)
        if e is not None:
            conds.append("ts < make_timestamptz(?)")
            params.append(e)
            conds.append(f"{PARTITION_COLUMN} <= CAST(make_timestamptz(?) AS DATE)")
            params.append(e)
        return (" WHERE " + " AND ".join(conds)) if conds else "", params

    def auctions(self, campaign_id: str | Sequence[str] | None = None, start=None, end=None,
                 columns: Sequence[str] | None = None,
                 as_arrow: bool = False) -> pl.DataFrame | pa.Table:
        """Accepted auction rows (``start <= ts < end``), sorted by campaign_id then ts.

        ``start``/``end``: datetime, date, ISO-8601 string or int microseconds (UTC).
        """
        names = [c.name for c in AUCTION_COLUMNS]
        cols = list(columns) if columns is not None else names
        unknown = [c for c in cols if c not in names and c != PARTITION_COLUMN]
        if unknown:
            raise UsageError(f"unknown auction column {unknown[0]!r}; columns are "
                             f"{', '.join(names)}")
        where, params = self._where(campaign_id, start, end)
        select = ", ".join(f'"{c}"' for c in cols)
        table = self.con.sql(
            f"SELECT {select} FROM auctions{where} ORDER BY campaign_id, ts", params=params
        ).to_arrow_table()
        return table if as_arrow else pl.from_arrow(table)

    # -- catalog facts (cached per instance)
    def campaign_ids(self) -> list[str]:
        """Campaign ids present in the accepted log, sorted."""
        if "campaign_ids" not in self._cache:
            rows = self.con.execute(
                "SELECT DISTINCT campaign_id FROM auctions ORDER BY 1").fetchall()
            self._cache["campaign_ids"] = [r[0] for r in rows]
        return list(self._cache["campaign_ids"])

    def campaign_row_counts(self) -> dict[str, int]:
        """Accepted rows per campaign."""
        if "campaign_rows" not in self._cache:
            rows = self.con.execute(
                "SELECT campaign_id, count(*) FROM auctions GROUP BY 1 ORDER BY 1").fetchall()
            self._cache["campaign_rows"] = dict(rows)
        return dict(self._cache["campaign_rows"])

    def placements(self) -> list[tuple[str, str]]:
        """Catalog-wide sorted (placement, pricing) pairs; placement codes index this list."""
        if "placements" not in self._cache:
            rows = self.con.execute(
                "SELECT DISTINCT placement, pricing FROM auctions ORDER BY 1, 2").fetchall()
            self._cache["placements"] = [(r[0], r[1]) for r in rows]
        return list(self._cache["placements"])

    def campaigns(self) -> dict[str, CampaignSpec]:
        """The campaign table: campaign_id -> :class:`CampaignSpec` (budget in currency)."""
        table = self._campaign_table
        if table is None:
            return {}
        out: dict[str, CampaignSpec] = {}
        cols = {n: table.column(n) for n in table.column_names}
        start = cols["start"].cast(pa.int64()).to_pylist()
        end = cols["end"].cast(pa.int64()).to_pylist()
        for i, cid in enumerate(cols["campaign_id"].to_pylist()):
            out[cid] = CampaignSpec(
                campaign_id=cid, budget=float(cols["budget"][i].as_py()),
                start_us=start[i], end_us=end[i],
                max_cost_per_result=cols["max_cost_per_result"][i].as_py(),
                group_id=cols["group_id"][i].as_py(),
            )
        return out

    def time_span_us(self) -> tuple[int, int]:
        """(min ts, max ts) of the accepted log, microseconds since the epoch UTC."""
        lo, hi = self.con.execute(
            "SELECT epoch_us(min(ts)), epoch_us(max(ts)) FROM auctions").fetchall()[0]
        if lo is None:
            raise InputError(f"{self.path}: the catalog has no accepted auction rows")
        return int(lo), int(hi)

    def row_count(self) -> int:
        """Accepted auction rows."""
        return int(self.con.execute("SELECT count(*) FROM auctions").fetchall()[0][0])

    def fingerprint(self) -> str:
        """Stable hash of the catalog's contents: data file names and sizes, the recorded
        source hashes and the campaign table bytes."""
        h = hashlib.sha256()
        for rel in [*self._auction_files, *self._rejected_files]:  # each sorted
            h.update(f"{rel}:{(self.path / rel).stat().st_size}\n".encode())
        for s in sorted(x["sha256"] for x in self.meta.get("sources", [])):
            h.update(s.encode())
        if self._campaign_sha is not None:  # the bytes of the table as read
            h.update(self._campaign_sha)
        return h.hexdigest()[:16]

    # -- kernel inputs
    def _placement_table(self) -> None:
        if getattr(self._local, "placements_registered", None) == os.getpid():
            return
        pl_list = self.placements()
        self.con.register("__placement_codes", pa.table({
            "placement": [p for p, _ in pl_list], "pricing": [q for _, q in pl_list],
            "code": pa.array(range(len(pl_list)), pa.int32())}))
        self._local.placements_registered = os.getpid()

    #: Row order within a campaign: ts, then every other column (request_id and the
    #: placement's (placement, pricing) pair, whose code is its rank in the sorted pairs),
    #: as the Spark engine orders: a replay never depends on how the files were read.
    _ORDER = ("ts_us", "request_id", "placement_code", "value", "min_win_price", "charge_prob")

    def _arrays_query(self, ids: list[str], start_us, end_us) -> tuple[pa.Table, np.ndarray]:
        """The rows of ``ids`` (unsorted) and the row order: campaigns in runs (in no
        particular campaign order), each in ``_ORDER``. pyarrow sorts with the keys in
        memory about 5x faster than DuckDB's ORDER BY over them; nulls sort last in both."""
        self._placement_table()
        where, params = self._where(ids, start_us, end_us)
        t = self.con.sql(
            f"SELECT {'campaign_id, ' if len(ids) > 1 else ''}epoch_us(ts) AS ts_us, value, "
            "min_win_price, charge_prob, code AS placement_code, "
            f"pricing = '{FIRST_PRICE}' AS first_price, request_id "
            f"FROM auctions JOIN __placement_codes USING (placement, pricing){where}",
            params=params).to_arrow_table()
        keys = [(c, "ascending") for c in self._ORDER]
        if len(ids) > 1:  # group by campaign first (a dictionary index: any order will do)
            codes = pc.dictionary_encode(t.column("campaign_id").combine_chunks()).indices
            t = t.append_column("__campaign", codes)
            keys.insert(0, ("__campaign", "ascending"))
        order = pc.sort_indices(t, sort_keys=keys).to_numpy()
        return t, order

    @staticmethod
    def _columns(t: pa.Table, request_ids: bool) -> dict[str, np.ndarray | None]:
        """The kernel columns of a query result as numpy arrays, in its row order."""
        rid = t.column("request_id")
        return {
            "ts_us": _np(t.column("ts_us"), np.int64),
            "value": _np(t.column("value"), np.float64),
            "min_win_price": _np(t.column("min_win_price"), np.float64),
            "charge_prob": _np(t.column("charge_prob"), np.float64),
            "placement_code": _np(t.column("placement_code"), np.int32),
            "first_price": _np(t.column("first_price"), np.bool_),
            "request_id": None if not request_ids or rid.null_count == len(rid) else
            np.asarray(rid.to_numpy(zero_copy_only=False), dtype=object),
        }

    def _to_arrays(self, campaign_id: str, cols: dict[str, np.ndarray | None],
                   order: np.ndarray) -> CampaignArrays:
        rid = cols["request_id"]
        return CampaignArrays(
            campaign_id=campaign_id,
            ts_us=cols["ts_us"][order], value=cols["value"][order],
            min_win_price=cols["min_win_price"][order],
            charge_prob=cols["charge_prob"][order],
            placement_code=cols["placement_code"][order],
            first_price=cols["first_price"][order],
            placements=tuple(p for p, _ in self.placements()),
            request_id=None if rid is None else rid[order],
        )

    def arrays(self, campaign_id: str, start_us: int | None = None,
               end_us: int | None = None, *, request_ids: bool = False) -> CampaignArrays:
        """One campaign's accepted rows as numpy arrays sorted by ts (``start <= ts < end``).

        ``placement_code`` indexes :meth:`placements` (catalog-wide); ``placements`` of the
        result holds the placement names in that order. An unknown campaign gives no rows.
        ``request_ids``: also load ``request_id`` (Python strings, a third of the load time;
        only campaign groups need them, to see the requests their members share).
        """
        t, order = self._arrays_query([campaign_id], start_us, end_us)
        return self._to_arrays(campaign_id, self._columns(t, request_ids), order)

    def iter_arrays(self, campaign_ids: Sequence[str], start_us=None, end_us=None, *,
                    request_ids: bool = False) -> Iterator[CampaignArrays]:
        """:meth:`arrays` for many campaigns, in the given order, reading them in batches."""
        ids = list(campaign_ids)
        counts = self.campaign_row_counts()
        i = 0
        while i < len(ids):
            batch, rows = [], 0
            while i < len(ids) and (not batch or rows + counts.get(ids[i], 0) <= ITER_BATCH_ROWS):
                batch.append(ids[i])
                rows += counts.get(ids[i], 0)
                i += 1
            if len(batch) == 1:
                yield self.arrays(batch[0], start_us, end_us, request_ids=request_ids)
                continue
            t, order = self._arrays_query(batch, start_us, end_us)
            # The order puts each campaign's rows in one run.
            runs: dict[str, np.ndarray] = {}
            if t.num_rows:
                cids = pc.take(t.column("campaign_id"), pa.array(order))
                ree = pc.run_end_encode(cids.combine_chunks())
                ends = ree.run_ends.to_pylist()
                starts = [0] + ends[:-1]
                runs = {cid: order[lo:hi] for cid, lo, hi in
                        zip(ree.values.to_pylist(), starts, ends, strict=True)}
            cols = self._columns(t, request_ids)
            for cid in batch:
                yield self._to_arrays(cid, cols, runs.get(cid, order[:0]))

    def close(self) -> None:
        """Close this thread's connection (others close when their thread or process ends)."""
        con = getattr(self._local, "con", None)
        if con is not None:
            con.close()
            self._local.con = None


def _duck_type(t: pa.DataType) -> str:
    if pa.types.is_timestamp(t):
        return "TIMESTAMPTZ"
    if pa.types.is_floating(t):
        return "DOUBLE"
    return "VARCHAR"


__all__ = ["Catalog", "to_us"]
