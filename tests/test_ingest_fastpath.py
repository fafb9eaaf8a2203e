"""Ingest's in-order path (rows written as they come, no duplicate pass) against the sorted
path: same accepted rows per partition, same rejected rows, same counts, and the catalog
layout (catalog order within each file, full row groups) holds on both.

Expected duplicate counts come from how each input is built, not from the code under test.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

import replay.ingest as ingest_mod
from replay.ingest import ingest
from replay.schema import RejectReason

T0 = 1_772_409_600_000_000  # 2026-03-02T00:00:00Z, microseconds
SMALL_ROW_GROUP = 64  # rows; small so that files hold several row groups and a remainder


DAY_US = 86_400_000_000


def _log(n: int, campaigns: int, in_order: bool, duplicates: int, seed: int) -> pa.Table:
    """``n`` rows over three days; ``in_order``: sorted by (date, campaign, ts).

    The last ``duplicates`` rows repeat (campaign_id, request_id) of rows from the middle
    with the latest timestamps, so each of them is a row that loses.
    """
    rng = np.random.default_rng(seed)
    ts = T0 + rng.integers(0, 3 * DAY_US - 1_000, n)
    cid = rng.integers(0, campaigns, n)
    rid = np.array([f"r{i}" for i in range(n)], dtype=object)
    for k in range(duplicates):
        donor, copy = n // 2 + k, n - duplicates + k
        cid[copy], rid[copy], ts[copy] = cid[donor], rid[donor], T0 + 3 * DAY_US - 1 - k
    rid[: n // 50] = None  # rows without request_id are never duplicates
    value = rng.random(n) * 0.02
    value[n // 3] = np.nan  # one rejected row
    order = np.lexsort((ts, cid, ts // DAY_US)) if in_order else np.arange(n)
    return pa.table({
        "ts": pa.array(ts[order], pa.timestamp("us", tz="UTC")),
        "campaign_id": pa.array([f"c{c}" for c in cid[order]]),
        "placement": pa.array(rng.choice(["feed", "app"], n)),
        "pricing": pa.array(rng.choice(["first_price", "second_price"], n)),
        "value": value[order],
        "min_win_price": rng.random(n) * 0.003,
        "request_id": pa.array(rid[order], pa.string()),
        "charge_prob": np.ones(n),
    })


def _catalog_state(cat: Path) -> dict:
    state: dict = {}
    for f in sorted((cat / "auctions").glob("*/*.parquet")):
        t = pq.read_table(f)
        cid = t.column("campaign_id").to_pylist()
        ts = t.column("ts").cast(pa.int64()).to_pylist()
        keys = list(zip(cid, ts, strict=True))
        assert keys == sorted(keys), f"{f}: not in (campaign_id, ts) order"
        meta = pq.ParquetFile(f).metadata
        sizes = [meta.row_group(i).num_rows for i in range(meta.num_row_groups)]
        assert all(s == SMALL_ROW_GROUP for s in sizes[:-1]), sizes
        assert 0 < sizes[-1] <= SMALL_ROW_GROUP
        rows = [tuple(r.values()) for r in t.to_pylist()]
        state[f.parent.name] = sorted(rows, key=repr)
    rejected = sorted((cat / "_rejected").glob("*.parquet"))
    state["rejected"] = [pq.read_table(f).to_pylist() for f in rejected]
    return state


CASES = {
    # (campaigns, in_order, duplicates)
    "in_order_no_duplicates": (1, True, 0),
    "in_order_several_campaigns": (3, True, 0),
    "in_order_with_duplicates": (1, True, 5),
    "out_of_order": (3, False, 0),
    "out_of_order_with_duplicates": (3, False, 4),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_in_order_path_matches_sorted_path(tmp_path: Path, monkeypatch, case: str) -> None:
    campaigns, in_order, duplicates = CASES[case]
    table = _log(3_000, campaigns, in_order, duplicates, seed=len(case))
    src = tmp_path / "log.parquet"
    pq.write_table(table, src)
    monkeypatch.setattr(ingest_mod, "ROW_GROUP_ROWS", SMALL_ROW_GROUP)
    queries: list[str] = []
    real_write = ingest_mod._write_accepted

    def spy(con, query, *args, **kwargs):
        queries.append(query)
        return real_write(con, query, *args, **kwargs)

    monkeypatch.setattr(ingest_mod, "_write_accepted", spy)
    results = {}
    for speculate in (True, False):
        monkeypatch.setattr(ingest_mod, "SPECULATE_ORDER", speculate)
        queries.clear()
        cat = tmp_path / f"cat_{speculate}"
        report = ingest([src], cat)
        results[speculate] = (report, _catalog_state(cat), list(queries))

    fast, slow = results[True], results[False]
    assert fast[1] == slow[1]
    for attr in ("rows_read", "accepted", "rejected", "campaign_ids", "first_ts", "last_ts"):
        assert getattr(fast[0], attr) == getattr(slow[0], attr), attr
    assert fast[0].rows_read == 3_000
    assert fast[0].rejected.get("duplicate_request", 0) == duplicates
    assert fast[0].rejected.get("nan_value") == 1
    # The sorted path sorts once; the in-order path writes once when it can.
    assert len(slow[2]) == 1 and "ORDER BY" in slow[2][0]
    if in_order and not duplicates:
        assert len(fast[2]) == 1 and "ORDER BY" not in fast[2][0]
    else:
        assert len(fast[2]) >= 2


def test_in_order_path_into_existing_catalog(tmp_path: Path, monkeypatch) -> None:
    """Rows already in the catalog are duplicates for the next ingest, on both paths."""
    monkeypatch.setattr(ingest_mod, "ROW_GROUP_ROWS", SMALL_ROW_GROUP)
    table = _log(1_000, 1, True, 0, seed=7)
    pq.write_table(table.slice(0, 600), tmp_path / "day1.parquet")
    pq.write_table(table.slice(400), tmp_path / "day2.parquet")  # 200 rows overlap
    states = []
    for speculate in (True, False):
        monkeypatch.setattr(ingest_mod, "SPECULATE_ORDER", speculate)
        cat = tmp_path / f"cat_{speculate}"
        ingest([tmp_path / "day1.parquet"], cat)
        report = ingest([tmp_path / "day2.parquet"], cat)
        overlap_with_ids = sum(r is not None for r in
                               table.slice(400, 200).column("request_id").to_pylist())
        assert report.rejected.get("duplicate_request") == overlap_with_ids
        states.append(sorted(pq.read_table(cat / "auctions").drop_columns(["date"])
                             .to_pylist(), key=repr))
    assert states[0] == states[1]


def test_repeated_hashes_exact() -> None:
    chunks = [np.array([5, 1, 9], np.uint64), pa.array([9, 2, 5, 5], pa.uint64())]
    assert ingest_mod._repeated(chunks).to_pylist() == [5, 9]
    assert ingest_mod._repeated([]).to_pylist() == []
    assert ingest_mod._repeated([np.arange(10, dtype=np.uint64)]).to_pylist() == []


def _order_rows(cids: list[str], ts: list[int], days: list[int]) -> tuple:
    """(days, ts, campaign ids) as ``_catalog_order_breaks`` takes them."""
    return np.array(days, np.int64), np.array(ts, np.int64), pa.array(cids)


@pytest.mark.parametrize(("cids", "ts", "days", "breaks"), [
    (["a", "a", "a"], [1, 2, 2], [0, 0, 0], False),  # one campaign, ties in time
    (["a", "a", "a"], [1, 3, 2], [0, 0, 0], True),  # one campaign, time goes back
    (["a", "b", "a"], [1, 2, 3], [0, 0, 0], True),  # same first and last campaign, b between
    (["a", "b", "b"], [5, 1, 2], [0, 0, 0], False),  # new campaign restarts the time
    (["b", "a"], [1, 2], [0, 0], True),  # campaign goes back
    (["b", "a"], [1, 2], [0, 1], False),  # ... on a new day
    (["a", "a"], [2, 1], [0, 1], False),
])
def test_catalog_order_check(cids: list[str], ts: list[int], days: list[int],
                             breaks: bool) -> None:
    assert ingest_mod._catalog_order_breaks(*_order_rows(cids, ts, days), None) is breaks


def test_order_check_against_previous_batch() -> None:
    rows = _order_rows(["a", "a"], [5, 6], [0, 0])
    assert ingest_mod._catalog_order_breaks(*rows, (0, "a", 5)) is False
    assert ingest_mod._catalog_order_breaks(*rows, (0, "a", 7)) is True
    assert ingest_mod._catalog_order_breaks(*rows, (0, "b", 1)) is True


def test_in_order_summary_and_statistics(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setattr(ingest_mod, "ROW_GROUP_ROWS", SMALL_ROW_GROUP)
    table = _log(3_000, campaigns=4, in_order=True, duplicates=0, seed=7)
    pq.write_table(table, tmp_path / "log.parquet")
    report = ingest([tmp_path / "log.parquet"], tmp_path / "cat")
    good = table.filter(pc.invert(pc.is_nan(table.column("value"))))
    assert report.accepted == good.num_rows == report.rows_read - 1
    counts = {r["values"]: r["counts"] for r in good.column("campaign_id").value_counts()
              .to_pylist()}
    meta = json.loads((tmp_path / "cat" / "catalog.json").read_text())
    assert meta["campaign_rows"] == dict(sorted(counts.items()))
    assert report.campaign_ids == sorted(counts)
    pairs = sorted(set(zip(good.column("placement").to_pylist(),
                           good.column("pricing").to_pylist(), strict=True)))
    assert meta["placements"] == [list(p) for p in pairs]
    assert report.first_ts == pc.min(good.column("ts")).as_py()
    assert report.last_ts == pc.max(good.column("ts")).as_py()
    for f in (tmp_path / "cat" / "auctions").glob("*/*.parquet"):
        md = pq.ParquetFile(f).metadata
        assert md.num_row_groups > 1
        names = [md.schema.column(i).name for i in range(md.num_columns)]
        rg = md.row_group(0)
        with_stats = {names[i] for i in range(md.num_columns)
                      if rg.column(i).is_stats_set and rg.column(i).statistics.has_min_max}
        assert with_stats == set(ingest_mod._STATISTICS_COLUMNS)


# --------------------------------------------------------------------------- cheap filter

#: Edge values of every checked column; the rows are their cross product over a few columns
#: and every value of the others, so each check meets each kind of neighbour.
_EDGE_TS = ["2026-03-02T10:00:00Z", "", " ", "next tuesday", "2026-03-02 10:00:00"]
_EDGE_TEXT = ["cA", "", " ", "  x ", "\t"]
_EDGE_PRICING = ["first_price", "second_price", "", "third_price", "First_price"]
_EDGE_NUMBER = ["0.01", "0", "-0", "-0.0", "", "abc", "nan", "NaN", "inf", "-inf", "-1e-300",
                "1e308"]
_EDGE_PROB = ["1", "0.5", "0", "1.0000001", "-1", "", "nan", "inf", "often"]


def _edge_rows() -> list[list[str]]:
    rows = []
    base = [_EDGE_TS[0], "cA", "feed", "second_price", "0.01", "0.002", "r", "1"]
    columns = [_EDGE_TS, _EDGE_TEXT, _EDGE_TEXT, _EDGE_PRICING, _EDGE_NUMBER, _EDGE_NUMBER,
               ["r"], _EDGE_PROB]
    for i, values in enumerate(columns):
        for v in values:
            for j, w in enumerate(columns):  # pairs: value v in column i, w in column j
                for x in w[:4]:
                    row = list(base)
                    row[i], row[j] = v, x
                    rows.append(row)
    return rows


def _view(con, path: Path) -> None:
    group = ingest_mod._Group([str(path)], pq.read_schema(path), path)
    typed, _raw = ingest_mod._group_view_sql(group)
    con.execute("CREATE OR REPLACE TEMP VIEW v AS " + typed)


@pytest.mark.parametrize("typed_columns", [False, True])
def test_accepted_condition_is_reason_is_null(tmp_path: Path, typed_columns: bool) -> None:
    """``ok`` (the accepted rows' filter) is TRUE exactly where ``reason`` is NULL, over
    string columns (CSV) and typed columns (Parquet with NULLs, NaN, infinities, -0.0)."""
    names = ["ts", "campaign_id", "placement", "pricing", "value", "min_win_price",
             "request_id", "charge_prob"]
    rows = _edge_rows()
    table = pa.table({n: [r[i] for r in rows] for i, n in enumerate(names)})
    if typed_columns:
        def num(col: str) -> pa.Array:
            out = []
            for s in table.column(col).to_pylist():
                try:
                    out.append(float(s))
                except ValueError:
                    out.append(None)
            return pa.array(out, pa.float64())

        ts = pc.cast(pc.if_else(pc.equal(table.column("ts"), _EDGE_TS[0]),
                                1_772_445_600_000_000, None), pa.int64())
        table = table.set_column(0, "ts", ts.cast(pa.timestamp("us", tz="UTC")))
        for col in ("value", "min_win_price", "charge_prob"):
            table = table.set_column(names.index(col), col, num(col))
        table = table.set_column(1, "campaign_id", pc.if_else(
            pc.equal(table.column("campaign_id"), ""), None, table.column("campaign_id")))
    path = tmp_path / "edges.parquet"
    pq.write_table(table, path)
    con = ingest_mod._connect(tmp_path)
    try:
        _view(con, path)
        mismatched = con.execute(
            "SELECT count(*) FROM v WHERE coalesce(ok, FALSE) <> (reason IS NULL)").fetchall()
        reasons = {r for (r,) in con.execute("SELECT DISTINCT reason FROM v").fetchall()}
    finally:
        con.close()
    assert mismatched == [(0,)]
    # The input reaches every check (duplicates are found elsewhere) and has good rows.
    expected = {str(r) for r in RejectReason} - {"duplicate_request"}
    if typed_columns:  # typed columns cannot hold an unparseable time or a non-number
        expected -= {"unparseable_ts"}
    assert None in reasons
    assert expected <= reasons


# --------------------------------------------------------------------------- writer threads

def _auction_files(cat: Path) -> dict[str, bytes]:
    return {f.parent.name: f.read_bytes() for f in sorted((cat / "auctions").glob("*/*.parquet"))}


@pytest.mark.parametrize("in_order", [True, False])
def test_writer_threads_write_identical_files(tmp_path: Path, monkeypatch, in_order: bool) -> None:
    """Files are the same bytes whether one or several threads encode them, on both paths."""
    monkeypatch.setattr(ingest_mod, "ROW_GROUP_ROWS", SMALL_ROW_GROUP)
    monkeypatch.setattr(ingest_mod, "WRITER_BACKLOG", 3)
    table = _log(4_000, campaigns=3, in_order=in_order, duplicates=2, seed=11)
    pq.write_table(table, tmp_path / "log.parquet")
    files = {}
    for threads in (1, 3):
        monkeypatch.setattr(ingest_mod, "WRITER_THREADS", threads)
        cat = tmp_path / f"cat{threads}"
        report = ingest([tmp_path / "log.parquet"], cat)
        files[threads] = _auction_files(cat)
        assert report.rows_read == 4_000
        assert report.accepted + report.rejected_total == report.rows_read
    assert len(files[1]) == 3  # one file per date partition
    assert files[1] == files[3]


def test_writer_failure_leaves_no_catalog(tmp_path: Path, monkeypatch) -> None:
    """An error on a writer thread surfaces as the ingest's error; nothing is left."""
    monkeypatch.setattr(ingest_mod, "ROW_GROUP_ROWS", SMALL_ROW_GROUP)
    pq.write_table(_log(2_000, 2, True, 0, seed=5), tmp_path / "log.parquet")

    def broken(self, table, cells):
        raise OSError("disk full")

    monkeypatch.setattr(ingest_mod._File, "write", broken)
    with pytest.raises(OSError, match="disk full"):
        ingest([tmp_path / "log.parquet"], tmp_path / "cat")
    assert not (tmp_path / "cat").exists()


# --------------------------------------------------------------------------- reconciliation

def test_counts_without_checking_pass(tmp_path: Path, monkeypatch) -> None:
    """An in-order log with rejected rows: rows read come from the file footers, the
    rejected rows are counted by reason, and no full counting pass runs."""
    table = _log(3_000, campaigns=2, in_order=True, duplicates=0, seed=3)
    pq.write_table(table.slice(0, 1_000), tmp_path / "a.parquet")
    pq.write_table(table.slice(1_000), tmp_path / "b.parquet")

    def no_full_pass(con):
        raise AssertionError("full counting pass")

    monkeypatch.setattr(ingest_mod, "_count_rows", no_full_pass)
    report = ingest([tmp_path / "a.parquet", tmp_path / "b.parquet"], tmp_path / "cat")
    assert report.rows_read == 3_000
    assert report.rejected == {"nan_value": 1}
    assert report.accepted == 2_999
    assert sorted(f["rows_read"] for f in report.files) == [1_000, 2_000]


@pytest.mark.parametrize("broken", ["_count_rejected", "_summary_cells"])
def test_reconciliation_failure_leaves_no_catalog(tmp_path: Path, monkeypatch,
                                                  broken: str) -> None:
    """Counts that do not add up (rejected rows lost, written rows miscounted) stop the
    ingest before anything is moved into the catalog."""
    pq.write_table(_log(1_000, 2, True, 0, seed=9), tmp_path / "log.parquet")
    real = getattr(ingest_mod, broken)
    if broken == "_count_rejected":
        monkeypatch.setattr(ingest_mod, broken, lambda con: {})
    else:
        monkeypatch.setattr(ingest_mod, broken, lambda t: real(t.slice(1)))
    with pytest.raises(RuntimeError, match="internal error"):
        ingest([tmp_path / "log.parquet"], tmp_path / "cat")
    assert not (tmp_path / "cat").exists()


def test_summary_matches_written_files(tmp_path: Path, monkeypatch) -> None:
    """The summary taken from the write stream equals a query over the written files, on
    the in-order and the sorted path."""
    monkeypatch.setattr(ingest_mod, "ROW_GROUP_ROWS", SMALL_ROW_GROUP)
    pq.write_table(_log(3_000, 4, False, 3, seed=2), tmp_path / "log.parquet")
    for speculate in (True, False):
        monkeypatch.setattr(ingest_mod, "SPECULATE_ORDER", speculate)
        cat = tmp_path / f"cat_{speculate}"
        report = ingest([tmp_path / "log.parquet"], cat)
        t = pq.read_table(cat / "auctions")
        counts = t.group_by("campaign_id").aggregate([([], "count_all")])
        meta = json.loads((cat / "catalog.json").read_text())
        assert meta["campaign_rows"] == dict(sorted(zip(
            counts.column("campaign_id").to_pylist(), counts.column("count_all").to_pylist(),
            strict=True)))
        pairs = {(p, q) for p, q in zip(t.column("placement").to_pylist(),
                                        t.column("pricing").to_pylist(), strict=True)}
        assert meta["placements"] == [list(p) for p in sorted(pairs)]
        assert report.first_ts == pc.min(t.column("ts")).as_py()
        assert report.last_ts == pc.max(t.column("ts")).as_py()
        assert report.accepted == t.num_rows
