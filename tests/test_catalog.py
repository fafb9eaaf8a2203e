"""Catalog: numpy round trip per campaign, windows, placements, process pools, query CLI."""

from __future__ import annotations

import datetime as dt
import json
import multiprocessing as mp
import pickle
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from replay.catalog import Catalog, to_us
from replay.errors import InputError, UsageError
from replay.ingest import ingest
from replay.schema import AUCTION_SCHEMA

T0 = 1_772_409_600_000_000  # 2026-03-02T00:00:00Z in microseconds


def _table(n: int = 500, seed: int = 1) -> pa.Table:
    rng = np.random.default_rng(seed)
    ts = T0 + rng.integers(0, 3 * 86_400_000_000, n)  # unsorted on purpose
    placement = rng.choice(["feed", "partner_b", "partner_a"], n)
    pricing = np.where(placement == "feed", "second_price", "first_price")
    return pa.Table.from_arrays([
        pa.array(ts).cast(AUCTION_SCHEMA.field("ts").type),
        pa.array(rng.choice(["k1", "k2", "k3"], n)),
        pa.array(placement), pa.array(pricing),
        pa.array(rng.random(n) * 0.02), pa.array(rng.random(n) * 0.004),
        pa.array([f"q{i}" for i in range(n)]), pa.array(rng.uniform(0.05, 1.0, n)),
    ], schema=AUCTION_SCHEMA)


@pytest.fixture()
def catalog(tmp_path: Path) -> tuple[Catalog, pa.Table]:
    table = _table()
    pq.write_table(table, tmp_path / "log.parquet")
    (tmp_path / "campaigns.csv").write_text("campaign_id,budget\nk1,1\nk2,2\nk3,3\n")
    ingest([tmp_path / "log.parquet"], tmp_path / "cat", campaigns=tmp_path / "campaigns.csv")
    return Catalog(tmp_path / "cat"), table


def _expected(table: pa.Table, cid: str, lo: int | None = None, hi: int | None = None):
    d = table.to_pydict()
    ts = table.column("ts").cast(pa.int64()).to_numpy()
    mask = np.array([c == cid for c in d["campaign_id"]])
    if lo is not None:
        mask &= ts >= lo
    if hi is not None:
        mask &= ts < hi
    idx = np.flatnonzero(mask)
    idx = idx[np.argsort(ts[idx], kind="stable")]
    pick = {k: [d[k][i] for i in idx] for k in d}
    return ts[idx], pick


def test_arrays_round_trip(catalog) -> None:
    cat, table = catalog
    placements = cat.placements()
    assert placements == [("feed", "second_price"), ("partner_a", "first_price"),
                          ("partner_b", "first_price")]
    for cid in ("k1", "k2", "k3"):
        arr = cat.arrays(cid, request_ids=True)
        ts, rows = _expected(table, cid)
        assert arr.campaign_id == cid and len(arr) == len(ts)
        assert arr.ts_us.dtype == np.int64 and np.array_equal(arr.ts_us, ts)
        assert np.array_equal(arr.value, np.array(rows["value"]))
        assert np.array_equal(arr.min_win_price, np.array(rows["min_win_price"]))
        assert np.array_equal(arr.charge_prob, np.array(rows["charge_prob"]))
        assert arr.placement_code.dtype == np.int32
        got = [placements[c] for c in arr.placement_code]
        assert got == list(zip(rows["placement"], rows["pricing"], strict=True))
        assert np.array_equal(arr.first_price, np.array(rows["pricing"]) == "first_price")
        assert list(arr.request_id) == rows["request_id"]
        assert arr.placements == ("feed", "partner_a", "partner_b")
    assert len(cat.arrays("nobody")) == 0


def test_arrays_window_and_iter(catalog) -> None:
    cat, table = catalog
    lo, hi = T0 + 86_400_000_000, T0 + 2 * 86_400_000_000 + 5
    arr = cat.arrays("k2", lo, hi)
    ts, _ = _expected(table, "k2", lo, hi)
    assert np.array_equal(arr.ts_us, ts) and len(ts) > 0
    many = list(cat.iter_arrays(["k3", "nobody", "k1"], start_us=lo, end_us=hi))
    assert [a.campaign_id for a in many] == ["k3", "nobody", "k1"]
    for a in many:
        single = cat.arrays(a.campaign_id, lo, hi)
        assert np.array_equal(a.ts_us, single.ts_us)
        assert np.array_equal(a.value, single.value)
    # polars / arrow access with the same window
    df = cat.auctions(campaign_id="k2", start=lo, end=hi)
    assert df.height == len(ts)
    both = cat.auctions(campaign_id=["k1", "k2"], columns=["campaign_id", "ts"], as_arrow=True)
    assert set(both.column("campaign_id").to_pylist()) == {"k1", "k2"}
    assert both.column_names == ["campaign_id", "ts"]
    with pytest.raises(UsageError, match="unknown auction column"):
        cat.auctions(columns=["price"])


def test_to_us_conversions() -> None:
    # Reference: 2026-03-02T00:00:00Z = 1772409600 s since the epoch (datetime arithmetic)
    ref = int((dt.datetime(2026, 3, 2, tzinfo=dt.UTC)
               - dt.datetime(1970, 1, 1, tzinfo=dt.UTC)).total_seconds()) * 1_000_000
    assert ref == T0
    assert to_us("2026-03-02T00:00:00Z") == T0
    assert to_us("2026-03-02T02:00:00+02:00") == T0
    assert to_us("2026-03-02") == T0
    assert to_us(dt.date(2026, 3, 2)) == T0
    assert to_us(dt.datetime(2026, 3, 2)) == T0  # naive = UTC
    assert to_us(dt.datetime(2026, 3, 2, 0, 0, 0, 7, tzinfo=dt.UTC)) == T0 + 7
    assert to_us(np.datetime64("2026-03-02T00:00:00")) == T0
    assert to_us(T0) == T0 and to_us(None) is None
    assert to_us("2026-03-02 00:00:00 UTC") == T0
    with pytest.raises(UsageError, match="^--start 'last week': not a time"):
        to_us("last week", "--start")
    for bad in (np.datetime64("NaT"), True, 1.5):
        with pytest.raises(UsageError, match="not a time"):
            to_us(bad)
    # the CLI windows and the catalog share this one conversion
    from replay.engines import windows
    from replay.schema import to_us as schema_to_us

    assert windows.to_us is to_us is schema_to_us


def test_facts_and_views(catalog) -> None:
    cat, table = catalog
    ts = table.column("ts").cast(pa.int64()).to_numpy()
    assert cat.time_span_us() == (int(ts.min()), int(ts.max()))
    assert cat.row_count() == table.num_rows
    assert cat.campaign_ids() == ["k1", "k2", "k3"]
    assert {k: v.budget for k, v in cat.campaigns().items()} == {"k1": 1, "k2": 2, "k3": 3}
    assert cat.sql("SELECT count(*) AS n FROM campaigns")["n"][0] == 3
    assert cat.sql("SELECT count(*) AS n FROM rejected")["n"][0] == 0
    assert len(cat.fingerprint()) == 16 and cat.fingerprint() == Catalog(cat.path).fingerprint()
    with pytest.raises(UsageError, match="query failed"):
        cat.sql("SELECT nope FROM auctions")


def test_not_a_catalog(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="not a catalog"):
        Catalog(tmp_path)
    with pytest.raises(InputError, match="no such catalog"):
        Catalog(tmp_path / "missing")


def _worker_total(cat: Catalog) -> tuple[int, float]:
    arr = cat.arrays("k1")
    return len(arr), float(arr.value.sum())


def test_catalog_in_worker_processes(catalog) -> None:
    cat, _ = catalog
    expect = _worker_total(cat)
    assert _worker_total(pickle.loads(pickle.dumps(cat))) == expect
    with ProcessPoolExecutor(1, mp_context=mp.get_context("spawn")) as pool:
        assert pool.submit(_worker_total, cat).result(timeout=120) == expect


def test_query_json_and_formats(catalog, tmp_path: Path) -> None:
    from replay.cli import app

    cat, table = catalog
    runner = CliRunner()
    sql = ("SELECT campaign_id, count(*) AS n, min(ts) AS first FROM auctions "
           "GROUP BY 1 ORDER BY 1")
    res = runner.invoke(app, ["query", str(cat.path), sql, "--format", "json"])
    assert res.exit_code == 0, res.output
    rows = json.loads(res.stdout)
    d = table.to_pydict()
    assert [r["campaign_id"] for r in rows] == ["k1", "k2", "k3"]
    for r in rows:
        mine = [t for t, c in zip(d["ts"], d["campaign_id"], strict=True)
                if c == r["campaign_id"]]
        assert r["n"] == len(mine)
        assert dt.datetime.fromisoformat(r["first"]) == min(mine)
    res = runner.invoke(app, ["query", str(cat.path), "SELECT 1 AS a, 'x' AS b",
                              "--format", "csv"])
    assert res.exit_code == 0 and res.stdout.splitlines() == ['"a","b"', '1,"x"']
    out = tmp_path / "q.parquet"
    res = runner.invoke(app, ["query", str(cat.path), "SELECT * FROM auctions",
                              "--format", "parquet", "--out", str(out)])
    assert res.exit_code == 0 and pq.read_table(out).num_rows == table.num_rows
    res = runner.invoke(app, ["query", str(cat.path), "SELECT 1"])
    assert res.exit_code == 0 and "1 rows" in res.stdout


def test_query_bad_sql_one_line(catalog, capsys) -> None:
    from replay.cli import main

    cat, _ = catalog
    with pytest.raises(SystemExit) as exc:
        main(["query", str(cat.path), "SELEC oops"])
    assert exc.value.code == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1 and err[0].startswith("error: query failed")


def test_rows_tied_in_time_come_back_in_one_order(tmp_path: Path) -> None:
    # Many rows share a timestamp: whatever order the log files hold them in, the kernel
    # input is the same, and the same as the Spark engine's ordering of the same rows.
    from replay.engines.spark import arrays_from_arrow

    table = _table(n=600, seed=4)
    ts = table.column("ts").cast(pa.int64()).to_numpy() // 3_600_000_000 * 3_600_000_000
    table = table.set_column(0, "ts", pa.array(ts).cast(AUCTION_SCHEMA.field("ts").type))
    (tmp_path / "campaigns.csv").write_text("campaign_id,budget\nk1,1\nk2,2\nk3,3\n")
    got = []
    for k, perm_seed in enumerate((1, 2)):
        perm = np.random.default_rng(perm_seed).permutation(table.num_rows)
        pq.write_table(table.take(pa.array(perm)), tmp_path / f"log{k}.parquet")
        ingest([tmp_path / f"log{k}.parquet"], tmp_path / f"cat{k}",
               campaigns=tmp_path / "campaigns.csv")
        got.append(Catalog(tmp_path / f"cat{k}").arrays("k1", request_ids=True))
    a, b = got
    assert len(a) > 0 and len(np.unique(a.ts_us)) < len(a)  # ties are really there
    sub = table.filter(pa.compute.equal(table["campaign_id"], "k1"))
    placements = Catalog(tmp_path / "cat0").placements()
    ref = arrays_from_arrow(sub, "k1", placements)
    for name in ("ts_us", "value", "min_win_price", "charge_prob", "placement_code",
                 "first_price"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
        assert np.array_equal(getattr(a, name), getattr(ref, name)), name
    assert list(a.request_id) == list(ref.request_id)



def test_tied_rows_sort_by_every_column_with_missing_request_ids_last(tmp_path: Path) -> None:
    # Reference: Python's sorted() on the rows as tuples (ts, request_id with None last,
    # (placement, pricing), value, min_win_price, charge_prob); the catalog's stated order.
    rng = np.random.default_rng(9)
    n = 400
    table = _table(n=n, seed=9)
    ts = T0 + rng.integers(0, 6, n) * 3_600_000_000  # six timestamps: ties everywhere
    rid = [None if rng.random() < 0.6 else f"q{i}" for i in range(n)]
    value = rng.choice([0.001, 0.002, 0.003], n)  # ties in value too
    table = table.set_column(0, "ts", pa.array(ts).cast(AUCTION_SCHEMA.field("ts").type))
    table = table.set_column(table.schema.get_field_index("request_id"), "request_id",
                             pa.array(rid, pa.string()))
    table = table.set_column(table.schema.get_field_index("value"), "value", pa.array(value))
    pq.write_table(table, tmp_path / "log.parquet")
    ingest([tmp_path / "log.parquet"], tmp_path / "cat")
    cat = Catalog(tmp_path / "cat")
    d = table.to_pydict()
    for cid in ("k1", "k2"):
        rows = sorted(
            (int(t), (r is None, r or ""), (p, q), v, m, c)
            for t, k, p, q, v, m, r, c in zip(ts, d["campaign_id"], d["placement"],
                                                d["pricing"], d["value"], d["min_win_price"],
                                                d["request_id"], d["charge_prob"], strict=True)
            if k == cid)
        placements = cat.placements()
        for arr in (cat.arrays(cid, request_ids=True),
                    next(a for a in cat.iter_arrays(["k3", cid], request_ids=True)
                         if a.campaign_id == cid)):
            got = [(int(t), (r is None, r or ""), placements[pc_], v, m, c)
                   for t, r, pc_, v, m, c in zip(arr.ts_us, arr.request_id, arr.placement_code,
                                                 arr.value, arr.min_win_price, arr.charge_prob,
                                                 strict=True)]
            assert got == rows
    assert cat.arrays("k1").request_id is None  # loaded only when asked for

def test_datetime_us_matches_numpy_datetime64() -> None:
    # Reference: numpy's datetime64[us] counts microseconds since 1970-01-01 UTC.
    import datetime as dt

    from replay.schema import US_PER_DAY, datetime_us

    cases = [dt.datetime(2026, 3, 1, 6, 30, 15, 123456), dt.datetime(1969, 12, 31, 23, 59, 59, 1),
             dt.datetime(1970, 1, 1)]
    for naive in cases:
        expected = int(np.datetime64(naive, "us").astype(np.int64))
        assert datetime_us(naive) == expected
        assert datetime_us(naive.replace(tzinfo=dt.UTC)) == expected
        plus2 = dt.timezone(dt.timedelta(hours=2))
        assert datetime_us((naive + dt.timedelta(hours=2)).replace(tzinfo=plus2)) == expected
    assert datetime_us(dt.datetime(1970, 1, 2)) == US_PER_DAY


def test_a_catalog_reads_only_committed_ingests_and_workers_share_its_snapshot(
        tmp_path: Path) -> None:
    # Ingest moves its data files in before it writes catalog.json (DEVELOPERS, "Catalog
    # layout"). Files of an ingest that is still committing, or crashed there, are on disk
    # but unrecorded: a reader leaves them out. A pickled Catalog (what a worker receives)
    # keeps the parent's snapshot even after a later ingest commits.
    import pickle
    import shutil

    from replay.ingest import read_catalog_json

    table = _table(n=400, seed=5)
    first, second = table.slice(0, 250), table.slice(250)
    pq.write_table(first, tmp_path / "a.parquet")
    pq.write_table(second, tmp_path / "b.parquet")
    ingest([tmp_path / "a.parquet"], tmp_path / "cat")
    cat = Catalog(tmp_path / "cat")
    assert cat.row_count() == 250
    fingerprint = cat.fingerprint()

    # an ingest caught between moving its files in and recording them
    part = next((tmp_path / "cat" / "auctions").glob("*/*.parquet"))
    half = part.with_name("part-20990101T000000-deadbeef-0.parquet")
    shutil.copy(part, half)
    assert "20990101T000000-deadbeef" not in {x["ingest_id"] for x in
                                              read_catalog_json(tmp_path / "cat")["ingests"]}
    seen = Catalog(tmp_path / "cat")
    assert seen.row_count() == 250 and seen.fingerprint() == fingerprint

    sent = pickle.dumps(cat)  # to a worker that starts after the next ingest
    half.unlink()
    ingest([tmp_path / "b.parquet"], tmp_path / "cat")
    worker_copy = pickle.loads(sent)
    assert worker_copy.row_count() == 250  # the parent's snapshot
    assert worker_copy.campaign_row_counts() == cat.campaign_row_counts()
    assert Catalog(tmp_path / "cat").row_count() == 400


def test_fingerprint_formula_is_unchanged(tmp_path: Path) -> None:
    # Runs record the catalog fingerprint and refuse to resume or compare across different
    # ones, so its formula must not move: sha256 over "path:size" of the data files
    # (auctions, then rejected, each sorted), the sources' sha256s (sorted) and the
    # campaign table's sha256, first 16 hex digits.
    import hashlib

    pq.write_table(_table(n=300, seed=8), tmp_path / "log.parquet")
    (tmp_path / "bad.csv").write_text(
        "ts,campaign_id,placement,pricing,value,min_win_price,request_id,charge_prob\n"
        "2026-03-02T10:00:00Z,k1,feed,second_price,-1,0.002,z1,1\n"  # rejected
        "2026-03-02T11:00:00Z,k1,feed,second_price,0.01,0.002,z2,1\n")
    (tmp_path / "campaigns.csv").write_text("campaign_id,budget\nk1,1\nk2,2\nk3,3\n")
    ingest([tmp_path / "log.parquet"], tmp_path / "cat", campaigns=tmp_path / "campaigns.csv")
    ingest([tmp_path / "bad.csv"], tmp_path / "cat")
    cat = Catalog(tmp_path / "cat")
    assert list((cat.path / "_rejected").glob("*.parquet"))  # both folders take part
    h = hashlib.sha256()
    for sub in ("auctions", "_rejected"):
        for f in sorted((cat.path / sub).rglob("*.parquet")):
            h.update(f"{f.relative_to(cat.path).as_posix()}:{f.stat().st_size}\n".encode())
    for s in sorted(x["sha256"] for x in cat.meta["sources"]):
        h.update(s.encode())
    h.update(hashlib.sha256((cat.path / "campaigns.parquet").read_bytes()).digest())
    assert cat.fingerprint() == h.hexdigest()[:16]


def test_the_campaign_table_is_part_of_the_snapshot(tmp_path: Path) -> None:
    import pickle

    table = _table(n=200, seed=6)
    pq.write_table(table, tmp_path / "log.parquet")
    (tmp_path / "c1.csv").write_text("campaign_id,budget\nk1,1\nk2,2\nk3,3\n")
    (tmp_path / "c2.csv").write_text("campaign_id,budget\nk1,10\n")
    ingest([tmp_path / "log.parquet"], tmp_path / "cat", campaigns=tmp_path / "c1.csv")
    cat = Catalog(tmp_path / "cat")
    sent = pickle.dumps(cat)
    ingest([], tmp_path / "cat", campaigns=tmp_path / "c2.csv")  # replaces k1's row
    for c in (cat, pickle.loads(sent)):
        assert c.campaigns()["k1"].budget == 1.0
        assert c.sql("SELECT budget FROM campaigns WHERE campaign_id = 'k1'")["budget"][0] == 1
    assert Catalog(tmp_path / "cat").campaigns()["k1"].budget == 10.0


def test_a_reader_never_pairs_one_ingests_campaign_table_with_anothers_catalog_json(
        tmp_path: Path, monkeypatch) -> None:
    """An ingest replaces the campaign table a moment before catalog.json. A reader that
    opens the catalog in between reads again until the two match (catalog.json records the
    table's sha256); a table changed outside ingest is one clear error naming the file."""
    import replay.catalog as catalog_module

    pq.write_table(_table(n=200, seed=7), tmp_path / "log.parquet")
    (tmp_path / "c1.csv").write_text("campaign_id,budget\nk1,1\n")
    (tmp_path / "c2.csv").write_text("campaign_id,budget\nk1,10\n")
    cat = tmp_path / "cat"
    ingest([tmp_path / "log.parquet"], cat, campaigns=tmp_path / "c1.csv")
    old_json = (cat / "catalog.json").read_bytes()
    ingest([], cat, campaigns=tmp_path / "c2.csv")
    new_json = (cat / "catalog.json").read_bytes()
    assert json.loads(new_json)["campaigns_sha256"] != json.loads(old_json)["campaigns_sha256"]

    # The half-way state: the new table beside the old catalog.json, which the "ingest"
    # finishes on the reader's first wait.
    (cat / "catalog.json").write_bytes(old_json)
    waits = []

    def finish_commit(seconds: float) -> None:
        waits.append(seconds)
        (cat / "catalog.json").write_bytes(new_json)

    monkeypatch.setattr(catalog_module.time, "sleep", finish_commit)
    assert Catalog(cat).campaigns()["k1"].budget == 10.0
    assert len(waits) == 1

    # A table replaced by hand, never matching: one line naming the file.
    monkeypatch.setattr(catalog_module.time, "sleep", lambda seconds: None)
    edited = pq.read_table(cat / "campaigns.parquet")
    edited = edited.set_column(edited.schema.get_field_index("budget"), "budget",
                               pa.array([5.0]))
    pq.write_table(edited, cat / "campaigns.parquet")
    with pytest.raises(InputError, match="campaigns.parquet: does not match"):
        Catalog(cat)
    # Ingesting the campaign table again repairs it.
    ingest([], cat, campaigns=tmp_path / "c1.csv")
    assert Catalog(cat).campaigns()["k1"].budget == 1.0
