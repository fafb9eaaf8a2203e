"""``replay ingest``: validate auction logs into a catalog (Parquet by date + quarantine)."""

from __future__ import annotations

from pathlib import Path

import typer


def ingest_command(
    sources: list[str] = typer.Argument(
        ..., metavar="SRC...",
        help="Auction-log files, globs or folders: Parquet, CSV (header line) or Arrow IPC. "
        "Columns and units: data/SCHEMA.md."),
    into: Path = typer.Option(..., "--into", help="Catalog folder (created if absent; "
                              "new rows are added to an existing catalog)."),
    campaigns: Path | None = typer.Option(
        None, "--campaigns", help="Campaign table (CSV, Parquet or Arrow): campaign_id, "
        "budget (currency over the flight), optional start, end (UTC), max_cost_per_result "
        "(currency per result), group_id. Rows replace earlier rows of the same campaign. "
        "Default: none (keep the catalog's table)."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bar (default: shown for "
                               "inputs over 32 MiB)."),
) -> None:
    """Check every row, write accepted rows to CATALOG/auctions (hive partitions by UTC date)
    and rejected rows, unchanged, with a reject_reason to CATALOG/_rejected. Files already
    ingested (same content hash) are skipped. Ingests into one catalog run one at a time
    (a second one waits). Prints rows read = accepted + rejected."""
    from replay.ingest import format_report, ingest

    report = ingest(sources, into, campaigns=campaigns, progress=not quiet,
                    on_wait=lambda message: typer.echo(message, err=True))
    for line in format_report(report):
        typer.echo(line)
    typer.echo(f"done in {report.seconds:.1f} s")


def register(app: typer.Typer) -> None:
    app.command(name="ingest")(ingest_command)
