"""``replay bench``: measured speed and memory of every kernel on this machine."""

from __future__ import annotations

import json
from pathlib import Path

import typer

#: Top-level keys of the bench result that are not timed cases.
NOT_CASES = frozenset({"format_version", "config", "machine", "rules", "ftl_vs_hindsight",
                       "targets"})
_STATUS_STYLE = {"met": "green", "missed": "bold red"}


def bench(
    rows: int = typer.Option(10_000_000, "--rows", min=1000,
                             help="Rows per synthetic campaign for the kernel cases."),
    ingest_rows: int = typer.Option(5_000_000, "--ingest-rows", min=1000,
                                    help="Rows of the synthetic log for the ingest cases."),
    repeats: int = typer.Option(5, "--repeats", min=1,
                                help="Timed runs per case (the median is reported)."),
    quick: bool = typer.Option(False, "--quick",
                               help="Small sizes (200,000 rows, 2 repeats): checks the "
                               "command works; the numbers mean little."),
    large: bool = typer.Option(False, "--large", help="Also run the large cases: hindsight "
                               "at 1M and --large-rows rows, and a backtest over a catalog "
                               "of that many rows (minutes; several GiB)."),
    large_rows: int = typer.Option(None, "--large-rows", min=10_000,
                                   help="Rows of the large cases (default 100,000,000; "
                                   "200,000 with --quick)."),
    large_campaigns: int = typer.Option(None, "--large-campaigns", min=1,
                                        help="Campaigns of the large backtest (default 100; "
                                        "2 with --quick)."),
    only: list[str] = typer.Option([], "--only", help="Run only cases whose name starts "
                                   "with this (repeatable), e.g. hindsight, rule/ftl."),
    as_json: bool = typer.Option(False, "--json", help="Print the result as JSON."),
    save: Path | None = typer.Option(None, "--save", help="Also write the JSON result to "
                                     "this file (to compare a later run against)."),
    against: Path | None = typer.Option(None, "--against", help="A JSON file saved by an "
                                        "earlier run: adds each case's speed relative to "
                                        "it (above 1 = faster now)."),
) -> None:
    """Time every kernel (median of REPEATS after a warm-up, each case in a fresh process)
    and report rows/s, seconds, peak RSS (MiB) and the fraction of the reference pass."""
    from rich.console import Console
    from rich.table import Table

    from replay.bench import BenchConfig, run_bench
    from replay.errors import InputError

    baseline: dict = {}
    if against is not None:
        try:
            baseline = json.loads(against.read_text())
        except (OSError, ValueError) as exc:
            raise InputError(f"{against}: not a bench JSON file saved by --save ({exc})") \
                from exc

    from dataclasses import replace

    cfg = BenchConfig.quick() if quick else BenchConfig(rows=rows, ingest_rows=ingest_rows,
                                                        repeats=repeats)
    if large_rows is not None:
        cfg = replace(cfg, large_rows=large_rows)
    if large_campaigns is not None:
        cfg = replace(cfg, large_campaigns=large_campaigns)
    console = Console(stderr=True)
    result = run_bench(cfg, progress=None if as_json else
                       (lambda name: console.print(f"[dim]running {name}[/dim]")),
                       only=only or None, large=large)
    if save is not None:
        save.write_text(json.dumps(result, indent=2))
    if as_json:
        typer.echo(json.dumps(result, indent=2))
        return
    table = Table(title=f"replay bench ({cfg.rows:,} rows per campaign)")
    columns = ["case", "rows", "seconds", "M rows/s", "x reference", "peak RSS MiB"]
    if baseline:
        columns.append("speed vs saved")
    for col in columns:
        table.add_column(col, justify="left" if col == "case" else "right")

    def add(name: str, entry: dict, before: dict | None) -> None:
        if "error" in entry:
            table.add_row(name, "-", "-", "-", "-", entry["error"][:60])
            return
        rate = entry.get("rows_per_s") or 0.0
        frac = entry.get("fraction_of_reference")
        cells = [name, f"{entry['rows']:,}", f"{entry['seconds']:.4f}", f"{rate / 1e6:.1f}",
                 "-" if frac is None else f"{frac:.3f}", f"{entry['peak_rss_mb']:.0f}"]
        if baseline:
            old = (before or {}).get("seconds")
            cells.append(f"{old / entry['seconds']:.2f}x" if old and entry["seconds"]
                         else "-")
        table.add_row(*cells)

    for name, entry in result.items():
        if name not in NOT_CASES and isinstance(entry, dict):
            add(name, entry, baseline.get(name))
    for rule, schedules in result["rules"].items():
        for schedule, entry in schedules.items():
            add(f"rule {rule} ({schedule})", entry,
                baseline.get("rules", {}).get(rule, {}).get(schedule))
    Console().print(table)
    if "ftl_vs_hindsight" in result:
        typer.echo(f"ftl 1,000 updates / one hindsight solve: "
                   f"{result['ftl_vs_hindsight']['ratio']:.2f}x")
    goals = Table(title=f"goals ({result['machine'].get('cpu_model', '?')})")
    for col in ("goal", "wanted", "measured", "status"):
        goals.add_column(col, justify="right" if col == "measured" else "left")
    for t in result.get("targets", []):
        x = t["measured"]
        shown = "-" if x is None else (f"{x / 1e6:.1f}M rows/s" if t["unit"] == "rows/s"
                                       else f"{x:.2f} {t['unit']}")
        goals.add_row(t["target"], t["goal"], shown, t["status"],
                      style=_STATUS_STYLE.get(t["status"]))
    Console().print(goals)


def register(app: typer.Typer) -> None:
    app.command(name="bench")(bench)
