"""The HTML report: self-contained, escaped, every section present, empty runs explained."""

from __future__ import annotations

import html
import json
import re
from datetime import UTC, datetime, timedelta
from html.parser import HTMLParser

import numpy as np
import polars as pl
import pytest
from test_compare import EVIL_ID, MemRun, make_manifest, real_runs

from replay.errors import UsageError
from replay.report import render_report, safe_json, write_report
from replay.runstore import open_run

EVIL = "</script><script>alert(1)</script>"
EVIL_PLACEMENT = '<img src=x onerror="alert(2)">'


def fake_run(ids: list[str], seed: int = 0, results_shift: float = 0.0,
             rule: str = "rule-a") -> MemRun:
    """A run with every documented column (DEVELOPERS.md, run store layout), made up."""
    rng = np.random.default_rng(seed)
    n = len(ids)
    budget = np.full(n, 100.0)
    spend = rng.uniform(60, 100, n)
    results = rng.uniform(20, 40, n) + results_shift
    opt = results + rng.uniform(1, 10, n)
    regret = opt - results
    unspent = regret * 0.3
    over = regret * 0.2
    t0 = datetime(2026, 3, 2, tzinfo=UTC)
    totals = pl.DataFrame({
        "setting_id": pl.Series([0] * n, dtype=pl.Int32), "campaign_id": ids,
        "budget": budget, "auctions": np.full(n, 1000), "wins": rng.integers(100, 300, n),
        "results": results, "spend": spend, "cost_per_result": spend / results,
        "budget_used": spend / budget,
        "exhausted_at": [t0 + timedelta(hours=30) if i % 2 else None for i in range(n)],
        "max_cost_per_result": [None] * n, "cap_violated": [False] * n,
        "min_price_cost": spend * 0.9, "opt_upper_bound": opt, "opt_results": opt - 0.1,
        "opt_spend": budget, "opt_lambda": rng.uniform(0.2, 0.5, n), "regret": regret,
        "relative_regret": regret / opt, "regret_unspent": unspent,
        "regret_overpayment": over, "regret_misallocation": regret - unspent - over,
        "pacing_error_max": rng.uniform(1, 5, n), "pacing_error_mean": rng.uniform(0, 1, n),
        "lambda_final": rng.uniform(0.2, 0.5, n), "lambda_volatility": rng.uniform(0, 1, n),
        "bids_above_logged": rng.uniform(0, 0.05, n),
    })
    srows = []
    for cid, s in zip(ids, spend, strict=True):
        cum = np.cumsum(rng.uniform(0, 1, 24))
        cum = cum / cum[-1] * s
        for u in range(24):
            srows.append({"setting_id": 0, "campaign_id": cid, "update": u,
                          "ts": t0 + timedelta(hours=u + 1), "lambda": 0.3 + 0.01 * u,
                          "mu": 0.0, "auctions": 40, "wins": 10, "results": 1.0,
                          "spend": 4.0, "target_spend": 100 / 24, "cum_spend": float(cum[u]),
                          "cum_target": 100 / 24 * (u + 1), "win_rate": 0.25})
    prow = []
    for cid in ids:
        for p, q in (("feed", "first_price"), (EVIL_PLACEMENT, "second_price")):
            prow.append({"setting_id": 0, "campaign_id": cid, "placement": p, "pricing": q,
                         "auctions": 500, "wins": 100, "results": 10.0,
                         "spend": float(rng.uniform(10, 50)), "opt_results": 12.0,
                         "opt_spend": float(rng.uniform(10, 50)),
                         "marginal_cost_per_result": 3.0, "opt_marginal_cost_per_result": 2.5})
    man = make_manifest(rule)
    man.update({"schedule": {"every_seconds": 3600}, "charges": "expected", "seed": 0,
                "code_version": "test", "created_at": "2026-03-06T00:00:00+00:00",
                "campaigns": ids})
    return MemRun(man, totals, "mem-run", pl.DataFrame(srows), pl.DataFrame(prow),
                  pl.DataFrame({"setting_id": [0]}))


class _Scripts(HTMLParser):
    """Collects the script elements and the text outside them, as a browser parses them."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.scripts: list[tuple[dict, str]] = []
        self._in: dict | None = None
        self._buf: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "script":
            self._in, self._buf = dict(attrs), []

    def handle_endtag(self, tag):
        if tag == "script" and self._in is not None:
            self.scripts.append((self._in, "".join(self._buf)))
            self._in = None

    def handle_data(self, data):
        (self._buf if self._in is not None else self.text).append(data)


def _parse(page: str) -> _Scripts:
    p = _Scripts()
    p.feed(page)
    return p


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    return real_runs(tmp_path_factory)


def _specs(page: str) -> list[dict]:
    return json.loads(_parse(page).scripts[2][1])


def test_campaign_id_cannot_break_out_of_the_script_element(runs):
    # A real run whose catalog has the campaign id "</script><script>alert(1)</script>".
    page = render_report(runs["a"], runs["b"], campaigns=[EVIL_ID])
    assert EVIL_ID not in page  # not raw in a table, not raw inside the chart JSON
    parsed = _parse(page)
    # Source: HTML standard, "script data state": a script element ends at the first
    # "</script"; Python's html.parser follows the same rule, so if the id had broken out
    # there would be extra script elements here.
    kinds = [a.get("type", "js") for a, _ in parsed.scripts]
    assert kinds == ["js", "js", "application/json", "js"]  # status, plotly, data, render
    blob = json.dumps(json.loads(parsed.scripts[2][1]))
    assert html.escape(EVIL_ID, quote=False) in blob  # escaped for plotly's text renderer
    assert EVIL_ID in "".join(parsed.text)  # the page shows the id as typed


def test_fake_log_strings_are_escaped_everywhere():
    page = render_report(fake_run([EVIL, "c2"]), campaigns=[EVIL])
    assert EVIL not in page and EVIL_PLACEMENT not in page
    assert html.escape(EVIL_PLACEMENT) in page


def test_safe_json_round_trips_and_has_no_angle_brackets():
    obj = {"a": EVIL, "b": ["<!--", "&amp;", "\u2028"], "c": 1.5}
    text = safe_json(obj)
    assert "<" not in text and ">" not in text and "&" not in text
    assert json.loads(text) == obj  # Source: RFC 8259, \u escapes decode to the same text


def test_self_contained_no_network_references(runs):
    page = render_report(runs["a"])
    # Nothing is fetched: no src/href to another origin, no stylesheet link, no web fonts.
    assert not re.search(r"""<(script|link|img|iframe)[^>]+(src|href)=["']?(https?:)?//""",
                         page)
    assert "<link" not in page
    assert "@import" not in page and "@font-face" not in page
    assert page.count("Plotly.newPlot") == 1
    plotly_scripts = [s for a, s in _parse(page).scripts if "plotly.js" in s[:3000].lower()]
    assert len(plotly_scripts) == 1  # inlined exactly once


def test_sections_cautions_and_curves_on_a_real_run(runs):
    run = open_run(runs["a"])
    page = render_report(runs["a"])
    for anchor in ("cautions", "summary", "distribution", "decomposition", "pacing",
                   "lambda", "placements", "curves"):
        assert f'id="{anchor}"' in page
    for text in ("Competitors are held fixed", "extrapolation",
                 "Fit windows end before replay windows", "avg CPM paid"):
        assert text in page
    specs = _specs(page)
    assert len(specs) == 6  # distribution, decomposition, pacing, lambda, placements, curves
    curves = specs[-1]["data"]
    t = run.totals
    for cid in t.sort("regret", descending=True)["campaign_id"].head(4).to_list():
        row = t.filter(pl.col("campaign_id") == cid).row(0, named=True)
        line = next(d for d in curves if d["name"] == html.escape(cid, quote=False)
                    + " optimum")
        at_budget = line["y"][int(np.argmin(np.abs(np.array(line["x"]) - row["budget"])))]
        # The curve (kernel budget_curve over the catalog rows) at 1x budget is the
        # engine's own hindsight optimum of the run, and no rule beats it.
        assert at_budget == pytest.approx(row["opt_upper_bound"], rel=1e-9)
        assert row["results"] <= at_budget * (1 + 1e-9)


def test_curves_omitted_with_a_note_when_catalog_is_gone(runs, tmp_path):
    import shutil

    run_dir = tmp_path / "moved"
    shutil.copytree(runs["a"], run_dir)
    man = json.loads((run_dir / "manifest.json").read_text())
    man["catalog"]["path"] = str(tmp_path / "nowhere")
    (run_dir / "manifest.json").write_text(json.dumps(man))
    page = render_report(run_dir)
    assert "Budget-response curves are omitted" in page and "not reachable" in page
    assert len(_specs(page)) == 5


def test_cpm_is_price_times_1000(runs):
    t = open_run(runs["a"]).totals
    page = render_report(runs["a"])
    cells = re.findall(r"<td>([^<]*)</td>", page)
    for row in t.iter_rows(named=True):
        # CPM = price per impression x 1000 (common practice: "cost per mille").
        cpm = row["spend"] / row["wins"] * 1000.0
        assert f"{cpm:,.4g}" in cells or f"{cpm:,.0f}" in cells


def test_cli_report_writes_the_file(runs, tmp_path):
    from typer.testing import CliRunner

    from replay.cli import app

    out = tmp_path / "r.html"
    res = CliRunner().invoke(app, ["report", str(runs["a"]), str(runs["b"]), "--out", str(out),
                                   "--campaign", EVIL_ID])
    assert res.exit_code == 0, res.output
    assert res.output.strip() == str(out) and out.stat().st_size > 1_000_000
    page = out.read_text()
    assert 'id="comparison"' in page
    res = CliRunner().invoke(app, ["report", str(tmp_path / "none")])
    assert res.exit_code != 0 and "no such run folder" in str(res.exception)


def test_comparison_section_with_run_b():
    ids = [f"c{i}" for i in range(10)]
    page = render_report(fake_run(ids, seed=1), fake_run(ids, seed=1, results_shift=5.0,
                                                         rule="rule-b"))
    assert 'id="comparison"' in page
    assert "B is <b>better</b>" in page


def test_overlapping_fit_window_is_flagged():
    run = fake_run(["c1"])
    run.manifest["window"] = dict(run.manifest["window"],
                                  train_end="2026-03-03T00:00:00+00:00")
    assert "overlaps the replay window" in render_report(run)


def test_empty_run_says_why(tmp_path):
    empty = fake_run(["c1"])
    empty.totals = empty.totals.clear()
    empty.series = empty.series.clear()
    out = write_report(empty, out=tmp_path / "r.html")
    page = out.read_text()
    assert "Nothing to show" in page and "no campaign results" in page
    assert json.loads(_parse(page).scripts[2][1]) == []


def test_unknown_campaign_is_a_clear_error():
    with pytest.raises(UsageError, match="campaign 'nope' is not in the run"):
        render_report(fake_run(["c1"]), campaigns=["nope"])
