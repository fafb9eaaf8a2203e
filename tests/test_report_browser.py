"""End to end: the report opens in headless Chromium, every chart renders, no script error.

The page writes its own status into ``#render-status`` after rendering (charts expected,
charts rendered, script errors, calls of ``alert``); Chromium's ``--dump-dom`` prints the
DOM after the page's scripts ran, and the test reads that status.
"""

from __future__ import annotations

import html
import json
import re
import shutil
import subprocess
from pathlib import Path

import pytest

pytestmark = pytest.mark.browser

CHROMIUM_FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
)


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    if Path("/usr/bin/chromium").exists():
        return "/usr/bin/chromium"
    pytest.skip("chromium is not installed (Debian package `chromium`; .ci/run installs it)")


def render_status(page: Path, tmp_path: Path) -> dict:
    """Open ``page`` in a fresh headless Chromium profile and return the page's status."""
    profile = tmp_path / "chromium-profile"
    cmd = [_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}",
           "--virtual-time-budget=10000", "--dump-dom", page.resolve().as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=180, check=False)
    match = re.search(r'<span id="render-status"[^>]*>(.*?)</span>', proc.stdout, re.S)
    assert match, f"no render status in the DOM (exit {proc.returncode}): {proc.stderr[-800:]}"
    return json.loads(html.unescape(match.group(1)))


def test_report_renders_every_chart_without_script_errors(browser_runs, tmp_path):
    from replay.report import write_report

    run_a, run_b, evil = browser_runs
    out = write_report(run_a, run_b, out=tmp_path / "report.html", campaigns=[evil])
    status = render_status(out, tmp_path)
    assert status["done"] is True
    assert status["errors"] == []
    assert status["alerts"] == 0  # the campaign id "</script><script>alert(1)..." stayed text
    assert status["expected"] >= 7  # distribution, decomposition, pacing, lambda, placements,
    assert status["rendered"] == status["expected"]  # curves, comparison
    assert status["failed"] == 0


def test_empty_report_page_renders(tmp_path, empty_run):
    from replay.report import write_report

    out = write_report(empty_run, out=tmp_path / "empty.html")
    status = render_status(out, tmp_path)
    assert status == {"expected": 0, "rendered": 0, "failed": 0, "errors": [], "alerts": 0,
                      "done": True}


def test_status_catches_a_script_error(tmp_path, empty_run):
    # The check itself can fail: a page with a throwing script reports the error.
    from replay.report import write_report

    out = write_report(empty_run, out=tmp_path / "bad.html")
    page = out.read_text().replace("</footer>", "</footer><script>throw new Error('boom')"
                                   "</script>")
    out.write_text(page)
    status = render_status(out, tmp_path)
    assert any("boom" in e for e in status["errors"])


@pytest.fixture(scope="module")
def browser_runs(tmp_path_factory):
    from test_compare import EVIL_ID, real_runs

    _chromium()  # skip before building runs when there is no browser
    runs = real_runs(tmp_path_factory)
    return runs["a"], runs["b"], EVIL_ID


@pytest.fixture()
def empty_run(tmp_path_factory, tmp_path):
    import polars as pl
    from test_compare import real_runs

    _chromium()
    empty = tmp_path / "empty-run"
    shutil.copytree(real_runs(tmp_path_factory)["a"], empty)
    for name in ("totals", "series", "placements"):
        path = empty / f"{name}.parquet"
        pl.read_parquet(path).clear().write_parquet(path)
    return empty
