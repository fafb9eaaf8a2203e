"""``replay bench``: measured speed and memory of every kernel on this machine."""

from __future__ import annotations

import json

import typer


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
    only: list[str] = typer.Option([], "--only", help="Run only cases whose name starts "
                                   "with this (repeatable), e.g. hindsight, rule/ftl."),
    as_json: bool = typer.Option(False, "--json", help="Print the result as JSON."),
) -> None:
    """Time every kernel (median of REPEATS after a warm-up, each case in a fresh process)
    and report rows/s, seconds, peak RSS (MiB) and the fraction of the reference pass."""
    from rich.console import Console
    from rich.table import Table

    from replay.bench import BenchConfig, run_bench

    cfg = BenchConfig.quick() if quick else BenchConfig(rows=rows, ingest_rows=ingest_rows,
                                                        repeats=repeats)
    console = Console(stderr=True)
    result = run_bench(cfg, progress=None if as_json else
                       (lambda name: console.print(f"[dim]running {name}[/dim]")),
                       only=only or None)
    if as_json:
        typer.echo(json.dumps(result, indent=2))
        return
    table = Table(title=f"replay bench ({cfg.rows:,} rows per campaign)")
    for col in ("case", "rows", "seconds", "M rows/s", "x reference", "peak RSS MiB"):
        table.add_column(col, justify="left" if col == "case" else "right")

    def add(name: str, entry: dict) -> None:
        if "error" in entry:
            table.add_row(name, "-", "-", "-", "-", entry["error"][:60])
            return
        rate = entry.get("rows_per_s") or 0.0
        frac = entry.get("fraction_of_reference")
        table.add_row(name, f"{entry['rows']:,}", f"{entry['seconds']:.4f}",
                      f"{rate / 1e6:.1f}", "-" if frac is None else f"{frac:.3f}",
                      f"{entry['peak_rss_mb']:.0f}")

    for name, entry in result.items():
        if isinstance(entry, dict) and ("rows" in entry or "error" in entry):
            add(name, entry)
    for rule, schedules in result["rules"].items():
        for schedule, entry in schedules.items():
            add(f"rule {rule} ({schedule})", entry)
    Console().print(table)
    if "ftl_vs_hindsight" in result:
        typer.echo(f"ftl 1,000 updates / one hindsight solve: "
                   f"{result['ftl_vs_hindsight']['ratio']:.2f}x")


def register(app: typer.Typer) -> None:
    app.command(name="bench")(bench)
