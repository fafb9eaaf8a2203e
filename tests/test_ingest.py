"""Ingestion: reconciliation, quarantine reasons, refusal without partial catalogs,
idempotent re-ingest, same catalog from CSV / Parquet / Arrow, campaign table checks.

Expected counts below come from how each test builds its input (hand-written bad rows), not
from the code under test.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from replay.catalog import Catalog
from replay.errors import InputError
from replay.ingest import ingest
from replay.schema import AUCTION_SCHEMA, RejectReason

HEADER = "ts,campaign_id,placement,pricing,value,min_win_price,request_id,charge_prob"
GOOD = "2026-03-02T10:00:00Z,cA,feed,second_price,0.01,0.002,{rid},1"

#: (csv line, expected reason). One line per kind of bad row; the first failing check wins.
BAD_LINES: list[tuple[str, RejectReason]] = [
    (",cA,feed,second_price,0.01,0.002,b1,1", RejectReason.MISSING_TS),
    ("next tuesday,cA,feed,second_price,0.01,0.002,b2,1", RejectReason.UNPARSEABLE_TS),
    ("2026-03-02T10:00:00Z,,feed,second_price,0.01,0.002,b3,1", RejectReason.EMPTY_CAMPAIGN_ID),
    ("2026-03-02T10:00:00Z,  ,feed,second_price,0.01,0.002,b3b,1",
     RejectReason.EMPTY_CAMPAIGN_ID),
    ("2026-03-02T10:00:00Z,cA,,second_price,0.01,0.002,b4,1", RejectReason.MISSING_PLACEMENT),
    ("2026-03-02T10:00:00Z,cA,feed,third_price,0.01,0.002,b5,1", RejectReason.UNKNOWN_PRICING),
    ("2026-03-02T10:00:00Z,cA,feed,,0.01,0.002,b5b,1", RejectReason.UNKNOWN_PRICING),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,,0.002,b6,1", RejectReason.MISSING_VALUE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,abc,0.002,b6b,1", RejectReason.MISSING_VALUE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,nan,0.002,b7,1", RejectReason.NAN_VALUE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,inf,0.002,b8,1", RejectReason.INFINITE_VALUE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,-0.5,0.002,b9,1", RejectReason.NEGATIVE_VALUE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,0.01,,b10,1",
     RejectReason.MISSING_MIN_WIN_PRICE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,0.01,NaN,b11,1",
     RejectReason.NAN_MIN_WIN_PRICE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,0.01,-inf,b12,1",
     RejectReason.INFINITE_MIN_WIN_PRICE),
    ("2026-03-02T10:00:00Z,cA,feed,second_price,0.01,-0.001,b13,1",
     RejectReason.NEGATIVE_MIN_WIN_PRICE),
    ("2026-03-02T10:00:00Z,cA,feed,first_price,0.01,0.002,b14,0",
     RejectReason.CHARGE_PROB_OUT_OF_RANGE),
    ("2026-03-02T10:00:00Z,cA,feed,first_price,0.01,0.002,b15,1.5",
     RejectReason.CHARGE_PROB_OUT_OF_RANGE),
    ("2026-03-02T10:00:00Z,cA,feed,first_price,0.01,0.002,b16,often",
     RejectReason.CHARGE_PROB_OUT_OF_RANGE),
    # two failures at once: the first check in schema order wins
    ("2026-03-02T10:00:00Z,,feed,third_price,-1,nan,b17,7", RejectReason.EMPTY_CAMPAIGN_ID),
]


def _write_bad_csv(path: Path, n_good: int = 30) -> dict[str, int]:
    lines = [HEADER]
    lines += [GOOD.format(rid=f"g{i}") for i in range(n_good)]
    expected: dict[str, int] = {}
    for line, reason in BAD_LINES:
        lines.append(line)
        expected[str(reason)] = expected.get(str(reason), 0) + 1
    # Duplicates of (request_id, campaign_id): the earliest ts survives even when it comes
    # later in the file; an exact copy later in the file loses; the same request_id in
    # another campaign is not a duplicate; an empty request_id never is.
    lines.append("2026-03-02T12:00:00Z,cA,feed,second_price,0.02,0.002,d1,1")  # loses (later ts)
    lines.append("2026-03-02T11:00:00Z,cA,feed,second_price,0.03,0.002,d1,1")  # kept
    lines.append("2026-03-02T11:00:00Z,cA,feed,second_price,0.03,0.002,d1,1")  # loses (copy)
    lines.append("2026-03-02T11:00:00Z,cB,feed,second_price,0.03,0.002,d1,1")  # kept
    lines.append("2026-03-02T11:00:00Z,cB,feed,second_price,0.03,0.002,,1")  # kept
    lines.append("2026-03-02T11:00:00Z,cB,feed,second_price,0.03,0.002,,1")  # kept
    expected[str(RejectReason.DUPLICATE_REQUEST)] = 2
    path.write_text("\n".join(lines) + "\n")
    return expected


def _good_table(n: int = 200, seed: int = 0, campaigns: int = 3) -> pa.Table:
    rng = np.random.default_rng(seed)
    ts = 1_772_409_600_000_000 + np.sort(rng.integers(0, 3 * 86_400_000_000, n))
    return pa.Table.from_arrays([
        pa.array(ts).cast(AUCTION_SCHEMA.field("ts").type),
        pa.array([f"c{i % campaigns}" for i in range(n)]),
        pa.array(rng.choice(["feed", "partner_x", "partner_y"], n)),
        pa.array(rng.choice(["second_price", "first_price"], n)),
        pa.array(rng.random(n) * 0.02),
        pa.array(rng.random(n) * 0.004),
        pa.array([f"r{i}" for i in range(n)]),
        pa.array(rng.uniform(0.01, 1.0, n)),
    ], schema=AUCTION_SCHEMA)


def test_reconciliation_every_kind_of_bad_row(tmp_path: Path) -> None:
    src = tmp_path / "log.csv"
    expected = _write_bad_csv(src, n_good=30)
    n_lines = len(src.read_text().splitlines()) - 1
    report = ingest([src], tmp_path / "cat")
    assert report.rows_read == n_lines
    assert report.rejected == {k: v for k, v in expected.items()}
    assert report.accepted == n_lines - sum(expected.values())
    assert report.rows_read == report.accepted + report.rejected_total
    cat = Catalog(tmp_path / "cat")
    # What is on disk agrees with the report.
    assert cat.row_count() == report.accepted
    on_disk = dict(cat.sql("SELECT reject_reason, count(*) AS n FROM rejected GROUP BY 1").rows())
    assert on_disk == expected
    # Rejected rows keep their original text values and point back to the source row.
    row = cat.sql("SELECT * FROM rejected WHERE request_id = 'b6b'").row(0, named=True)
    assert row["value"] == "abc" and row["reject_reason"] == "missing_value"
    assert row["source_file"] == str(src.resolve())
    lines = src.read_text().splitlines()
    assert lines[row["source_row"]].split(",")[6] == "b6b"  # source_row is 1-based data row
    # The surviving duplicate is the earliest one.
    kept = cat.sql("SELECT value FROM auctions WHERE campaign_id = 'cA' AND request_id = 'd1'")
    assert kept["value"].to_list() == [0.03]
    # ts parsed as UTC
    assert cat.sql("SELECT min(ts) AS t FROM auctions")["t"][0].isoformat() \
        == "2026-03-02T10:00:00+00:00"


@settings(max_examples=15, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(picks=st.lists(st.integers(0, len(BAD_LINES)), min_size=1, max_size=40))
def test_rows_read_equals_accepted_plus_rejected(tmp_path_factory, picks: list[int]) -> None:
    """Any mix of good and bad rows reconciles exactly (index len(BAD_LINES) = a good row)."""
    folder = tmp_path_factory.mktemp("mix")
    lines, expected_bad = [HEADER], 0
    for j, k in enumerate(picks):
        if k == len(BAD_LINES):
            lines.append(GOOD.format(rid=f"g{j}"))
        else:
            lines.append(BAD_LINES[k][0].replace(",b", f",x{j}b"))
            expected_bad += 1
    (folder / "mix.csv").write_text("\n".join(lines) + "\n")
    report = ingest([folder / "mix.csv"], folder / "cat")
    assert report.rows_read == len(picks)
    assert report.rejected_total == expected_bad
    assert report.accepted + report.rejected_total == report.rows_read


def test_missing_column_refused_and_nothing_written(tmp_path: Path) -> None:
    table = _good_table().drop_columns(["min_win_price"])
    src = tmp_path / "nocol.parquet"
    pq.write_table(table, src)
    with pytest.raises(InputError) as err:
        ingest([src], tmp_path / "cat")
    message = str(err.value)
    assert "min_win_price" in message and "nocol.parquet" in message
    assert "\n" not in message
    assert not (tmp_path / "cat").exists()


def test_missing_column_existing_catalog_unchanged(tmp_path: Path) -> None:
    good = tmp_path / "good.parquet"
    pq.write_table(_good_table(), good)
    ingest([good], tmp_path / "cat")
    before = sorted(p.relative_to(tmp_path) for p in (tmp_path / "cat").rglob("*"))
    json_before = (tmp_path / "cat" / "catalog.json").read_text()
    bad = tmp_path / "bad.csv"
    bad.write_text("ts,campaign_id,placement,value,min_win_price\n2026-03-02,c,f,1,1\n")
    with pytest.raises(InputError, match="pricing"):
        ingest([bad], tmp_path / "cat")
    after = sorted(p.relative_to(tmp_path) for p in (tmp_path / "cat").rglob("*"))
    assert before == after
    assert (tmp_path / "cat" / "catalog.json").read_text() == json_before


def test_cli_missing_column_exit_2_one_line(tmp_path: Path) -> None:
    src = tmp_path / "nocol.csv"
    src.write_text("ts,campaign_id,placement,pricing,min_win_price\n"
                   "2026-03-02T00:00:00Z,c1,feed,second_price,0.1\n")
    proc = subprocess.run(
        [sys.executable, "-c", "from replay.cli import main; main()", "ingest", str(src),
         "--into", str(tmp_path / "cat")], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    err_lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert len(err_lines) == 1, proc.stderr
    assert "value" in err_lines[0] and "nocol.csv" in err_lines[0]
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "cat").exists()


def test_empty_and_unreadable_files_refused(tmp_path: Path) -> None:
    empty = tmp_path / "empty.csv"
    empty.write_text(HEADER + "\n")
    with pytest.raises(InputError, match="no input rows"):
        ingest([empty], tmp_path / "cat")
    assert not (tmp_path / "cat").exists()
    junk = tmp_path / "junk.parquet"
    junk.write_bytes(b"this is not parquet at all")
    with pytest.raises(InputError, match="junk.parquet"):
        ingest([junk], tmp_path / "cat")
    assert not (tmp_path / "cat").exists()
    with pytest.raises(InputError, match="no such file"):
        ingest([tmp_path / "absent.parquet"], tmp_path / "cat")


def test_idempotent_reingest(tmp_path: Path) -> None:
    src = tmp_path / "log.csv"
    _write_bad_csv(src)
    first = ingest([src], tmp_path / "cat")
    cat = Catalog(tmp_path / "cat")
    fp, rows, rejected = cat.fingerprint(), cat.row_count(), cat.sql(
        "SELECT count(*) AS n FROM rejected")["n"][0]
    # the same file again, also under another name and through a folder
    copy = tmp_path / "sub" / "copy.csv"
    copy.parent.mkdir()
    copy.write_bytes(src.read_bytes())
    second = ingest([src, tmp_path / "sub"], tmp_path / "cat")
    assert second.rows_read == 0 and second.accepted == 0 and second.rejected == {}
    assert sorted(second.skipped) == sorted([str(src.resolve()), str(copy.resolve())])
    cat2 = Catalog(tmp_path / "cat")
    assert cat2.fingerprint() == fp and cat2.row_count() == rows == first.accepted
    assert cat2.sql("SELECT count(*) AS n FROM rejected")["n"][0] == rejected


def test_duplicates_against_rows_already_in_catalog(tmp_path: Path) -> None:
    base = _good_table(50)
    pq.write_table(base, tmp_path / "day1.parquet")
    ingest([tmp_path / "day1.parquet"], tmp_path / "cat")
    # day 2 repeats 10 of day 1's (request_id, campaign_id) pairs and adds 20 new rows
    repeat = base.slice(0, 10)
    fresh = _good_table(20, seed=5).set_column(
        6, "request_id", pa.array([f"new{i}" for i in range(20)]))
    pq.write_table(pa.concat_tables([repeat, fresh]), tmp_path / "day2.parquet")
    report = ingest([tmp_path / "day2.parquet"], tmp_path / "cat")
    assert report.rows_read == 30
    assert report.rejected == {"duplicate_request": 10}
    assert Catalog(tmp_path / "cat").row_count() == 70


def _same_rows(tmp_path: Path) -> pa.Table:
    table = _good_table(300, seed=3)
    # a few bad values that survive every format: NaN, negative, unknown pricing
    value = table.column("value").to_numpy().copy()
    value[[5, 17]] = np.nan
    price = table.column("min_win_price").to_numpy().copy()
    price[40] = -1.0
    pricing = table.column("pricing").to_pylist()
    pricing[77] = "auction"
    table = table.set_column(4, "value", pa.array(value))
    table = table.set_column(5, "min_win_price", pa.array(price))
    return table.set_column(3, "pricing", pa.array(pricing))


def test_csv_parquet_arrow_same_catalog(tmp_path: Path) -> None:
    table = _same_rows(tmp_path)
    pq.write_table(table, tmp_path / "log.parquet")
    pacsv.write_csv(table, tmp_path / "log.csv")
    feather.write_feather(table, tmp_path / "log.arrow")
    with pa.OSFile(str(tmp_path / "log_stream.arrows"), "wb") as sink, \
            pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table, max_chunksize=64)
    results = {}
    for name in ("log.parquet", "log.csv", "log.arrow", "log_stream.arrows"):
        cat_dir = tmp_path / f"cat_{name.replace('.', '_')}"
        report = ingest([tmp_path / name], cat_dir)
        cat = Catalog(cat_dir)
        results[name] = (report.rejected, cat.auctions(as_arrow=True),
                         cat.placements(), cat.time_span_us())
    ref = results["log.parquet"]
    assert ref[0] == {"unknown_pricing": 1, "nan_value": 2, "negative_min_win_price": 1}
    assert ref[1].num_rows == 296
    for name, res in results.items():
        assert res[0] == ref[0], name
        assert res[1].equals(ref[1]), name
        assert res[2:] == ref[2:], name


def test_globs_and_folders(tmp_path: Path) -> None:
    table = _good_table(90)
    (tmp_path / "logs").mkdir()
    for i in range(3):
        pq.write_table(table.slice(30 * i, 30), tmp_path / "logs" / f"part{i}.parquet")
    (tmp_path / "logs" / "notes.txt").write_text("ignored")
    r1 = ingest([str(tmp_path / "logs" / "part*.parquet")], tmp_path / "cat1")
    r2 = ingest([tmp_path / "logs"], tmp_path / "cat2")
    assert r1.rows_read == r2.rows_read == 90 and r1.accepted == 90
    assert len([f for f in r2.files if f["status"] == "ingested"]) == 3
    with pytest.raises(InputError, match="matches no file"):
        ingest([str(tmp_path / "nothing*.csv")], tmp_path / "cat3")


def test_catalog_json_records_sources(tmp_path: Path) -> None:
    pq.write_table(_good_table(), tmp_path / "a.parquet")
    ingest([tmp_path / "a.parquet"], tmp_path / "cat")
    meta = json.loads((tmp_path / "cat" / "catalog.json").read_text())
    import hashlib

    digest = hashlib.sha256((tmp_path / "a.parquet").read_bytes()).hexdigest()
    assert [s["sha256"] for s in meta["sources"]] == [digest]
    parts = sorted(p.parent.name for p in (tmp_path / "cat" / "auctions").glob("*/*.parquet"))
    assert parts and all(p.startswith("date=2026-03-0") for p in parts)
    assert not list((tmp_path / "cat").glob("_tmp-*"))


# ----------------------------------------------------------------- campaign table

def _campaign_csv(path: Path, body: str) -> Path:
    path.write_text("campaign_id,budget,start,end,max_cost_per_result,group_id\n" + body)
    return path


def test_campaign_table_errors(tmp_path: Path) -> None:
    pq.write_table(_good_table(), tmp_path / "log.parquet")
    cases = {
        "c0,0,,,,\n": "budget",
        "c0,-5,,,,\n": "budget",
        "c0,abc,,,,\n": "budget",
        "c0,10,,,,\nc0,20,,,,\n": "duplicate campaign_id",
        "c0,10,,,-1,\n": "max_cost_per_result",
        "c0,10,2026-03-03,2026-03-02,,\n": "end must be after start",
        "c0,10,soon,,,\n": "start",
        ",10,,,,\n": "empty campaign_id",
    }
    for body, needle in cases.items():
        table = _campaign_csv(tmp_path / "campaigns.csv", body)
        with pytest.raises(InputError) as err:
            ingest([tmp_path / "log.parquet"], tmp_path / "cat", campaigns=table)
        assert needle in str(err.value) and "campaigns.csv" in str(err.value), body
        assert not (tmp_path / "cat").exists()
    nobudget = tmp_path / "nobudget.csv"
    nobudget.write_text("campaign_id,cap\nc0,1\n")
    with pytest.raises(InputError, match="budget"):
        ingest([tmp_path / "log.parquet"], tmp_path / "cat", campaigns=nobudget)


def test_campaign_table_coverage_warnings_and_upsert(tmp_path: Path) -> None:
    pq.write_table(_good_table(campaigns=3), tmp_path / "log.parquet")  # c0, c1, c2
    table = _campaign_csv(tmp_path / "campaigns.csv",
                          "c0,10,2026-03-02T00:00:00Z,,0.5,g1\nc1,20,,,,g1\nc9,5,,,,\n")
    report = ingest([tmp_path / "log.parquet"], tmp_path / "cat", campaigns=table)
    assert report.campaigns_without_table_row == ["c2"]
    assert report.table_campaigns_without_rows == ["c9"]
    assert any("c2" in w for w in report.warnings) and any("c9" in w for w in report.warnings)
    cat = Catalog(tmp_path / "cat")
    assert cat.campaign_ids() == ["c0", "c1", "c2"]  # c2 is still ingested
    specs = cat.campaigns()
    assert specs["c0"].budget == 10.0 and specs["c0"].max_cost_per_result == 0.5
    assert specs["c0"].group_id == "g1" and specs["c0"].start_us == 1_772_409_600_000_000
    assert specs["c1"].max_cost_per_result is None and specs["c1"].end_us is None
    # A later table adds c2 and changes c1's budget; c0 and c9 stay.
    upd = _campaign_csv(tmp_path / "more.csv", "c1,25,,,,\nc2,7,,,,\n")
    report2 = ingest([tmp_path / "log.parquet"], tmp_path / "cat", campaigns=upd)
    assert report2.skipped and report2.campaigns_without_table_row == []
    specs = Catalog(tmp_path / "cat").campaigns()
    assert {k: v.budget for k, v in specs.items()} == {"c0": 10.0, "c1": 25.0, "c2": 7.0,
                                                       "c9": 5.0}


def _log_with_ids(path: Path, seed: int, prefix: str, n: int = 300) -> int:
    table = _good_table(n=n, seed=seed)
    table = table.set_column(table.schema.get_field_index("request_id"), "request_id",
                             pa.array([f"{prefix}{i}" for i in range(n)]))
    pq.write_table(table, path)
    return n


def test_an_ingest_waits_while_another_holds_the_catalog(tmp_path: Path) -> None:
    import threading
    import time

    from replay.ingest import catalog_write_lock, read_catalog_json

    cat = tmp_path / "cat"
    n_a = _log_with_ids(tmp_path / "a.parquet", 1, "a")
    n_b = _log_with_ids(tmp_path / "b.parquet", 2, "b")
    ingest([tmp_path / "a.parquet"], cat)
    waits: list[str] = []
    out: dict = {}
    with catalog_write_lock(cat):
        worker = threading.Thread(target=lambda: out.update(
            report=ingest([tmp_path / "b.parquet"], cat, on_wait=waits.append)))
        worker.start()
        for _ in range(600):  # until it reaches the lock (it hashes its input first)
            if waits or not worker.is_alive():
                break
            time.sleep(0.05)
        assert waits and "waiting for the ingest holding its lock (pid" in waits[0], waits
        assert worker.is_alive()
        assert len(read_catalog_json(cat)["sources"]) == 1  # nothing committed meanwhile
    worker.join(timeout=120)
    assert not worker.is_alive() and out["report"].accepted == n_b
    assert Catalog(cat).row_count() == n_a + n_b
    assert len(read_catalog_json(cat)["sources"]) == 2


def test_concurrent_ingests_into_one_new_catalog_keep_every_row(tmp_path: Path) -> None:
    # Without the lock both would read the same (absent) catalog.json and the later commit
    # would drop the earlier one's sources and row counts.
    import threading

    from replay.ingest import read_catalog_json

    cat = tmp_path / "cat"
    sizes = {name: _log_with_ids(tmp_path / f"{name}.parquet", seed, name, n)
             for name, seed, n in (("a", 1, 300), ("b", 2, 500), ("c", 3, 700))}
    errors: list[BaseException] = []

    def run(name: str) -> None:
        try:
            ingest([tmp_path / f"{name}.parquet"], cat)
        except BaseException as exc:  # reported below
            errors.append(exc)

    workers = [threading.Thread(target=run, args=(name,)) for name in sizes]
    for w in workers:
        w.start()
    for w in workers:
        w.join(timeout=120)
    assert not errors
    meta = read_catalog_json(cat)
    assert sorted(Path(s["path"]).name for s in meta["sources"]) == \
        ["a.parquet", "b.parquet", "c.parquet"]
    assert sum(meta["campaign_rows"].values()) == sum(sizes.values())
    assert Catalog(cat).row_count() == sum(sizes.values())


def test_what_a_dead_ingest_left_is_cleared_by_the_next(tmp_path: Path) -> None:
    # An ingest killed between moving its files in and writing catalog.json leaves files no
    # reader sees (Catalog reads committed ingests only); the next ingest removes them and
    # says so, and the rows come back when their source is ingested again.
    import shutil

    cat = tmp_path / "cat"
    n_a = _log_with_ids(tmp_path / "a.parquet", 1, "a")
    n_b = _log_with_ids(tmp_path / "b.parquet", 2, "b")
    ingest([tmp_path / "a.parquet"], cat)
    part = next((cat / "auctions").glob("*/*.parquet"))
    dead = part.with_name("part-20990101T000000-deadbeef-0.parquet")
    shutil.copy(part, dead)
    (cat / "_tmp-20990101T000000-deadbeef" / "staged").mkdir(parents=True)
    assert Catalog(cat).row_count() == n_a
    report = ingest([tmp_path / "b.parquet"], cat)
    assert not dead.exists() and not list(cat.glob("_tmp-*"))
    assert any("1 data file(s) of 1 ingest(s) that did not finish" in w
               for w in report.warnings), report.warnings
    assert Catalog(cat).row_count() == n_a + n_b
    assert part.exists()  # committed files stay


def test_a_campaign_table_broken_outside_ingest_is_one_line_naming_it(tmp_path) -> None:
    """The next ingest reads the catalog's campaign table to upsert into it: one written by
    hand without the catalog's columns is an InputError naming the file, and nothing of
    the new ingest is committed."""
    from replay.ingest import CAMPAIGNS_FILE

    (tmp_path / "c1.csv").write_text("campaign_id,budget\nk1,1\n")
    cat = tmp_path / "cat"
    ingest([], cat, campaigns=tmp_path / "c1.csv")
    pq.write_table(pa.table({"campaign_id": ["k9"], "budget": [5.0]}), cat / CAMPAIGNS_FILE)
    before = (cat / "catalog.json").read_bytes()
    with pytest.raises(InputError, match=r"campaigns\.parquet: not a campaign table"):
        ingest([], cat, campaigns=tmp_path / "c1.csv")
    assert (cat / "catalog.json").read_bytes() == before
