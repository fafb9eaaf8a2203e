"""``replay query``: DuckDB SQL over a catalog's views auctions, campaigns and rejected."""

from __future__ import annotations

import datetime as dt
import decimal
import json
import math
import sys
from enum import StrEnum
from pathlib import Path

import typer

from replay.errors import UsageError

#: Rows shown by ``--format table`` before the output is cut (use csv/json for all rows).
TABLE_MAX_ROWS = 200


class OutputFormat(StrEnum):
    table = "table"
    csv = "csv"
    json = "json"
    parquet = "parquet"


def _json_value(x: object) -> object:
    if isinstance(x, dt.datetime | dt.date | dt.time):
        return x.isoformat()
    if isinstance(x, dt.timedelta):
        return x.total_seconds()
    if isinstance(x, decimal.Decimal):
        return float(x)
    if isinstance(x, float) and not math.isfinite(x):
        return None  # JSON has no NaN or infinity
    if isinstance(x, bytes):
        return x.hex()
    if isinstance(x, dict):
        return {k: _json_value(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_json_value(v) for v in x]
    return x


def rows_to_json(table) -> str:
    """A JSON list of row objects; timestamps ISO-8601, NaN and infinity as null."""
    return json.dumps([_json_value(row) for row in table.to_pylist()], indent=1)


def query_command(
    catalog: Path = typer.Argument(..., help="Catalog folder written by `replay ingest`."),
    sql: str = typer.Argument(..., metavar="SQL",
                              help="DuckDB SQL over the views auctions, campaigns, rejected. "
                              "Prices are currency per impression; ts is UTC."),
    fmt: OutputFormat = typer.Option(OutputFormat.table, "--format",
                                     help="Output format (default table; table shows at most "
                                     f"{TABLE_MAX_ROWS} rows)."),
    out: Path | None = typer.Option(None, "--out", help="Write to this file instead of the "
                                    "terminal (required for parquet)."),
) -> None:
    """Run one SQL query on a catalog and print or save the result."""
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    from replay.catalog import Catalog

    table = Catalog(catalog).arrow(sql)
    if fmt == OutputFormat.parquet:
        if out is None:
            raise UsageError("--format parquet needs --out FILE")
        pq.write_table(table, out)
        typer.echo(f"wrote {table.num_rows:,} rows to {out}", err=True)
        return
    if fmt == OutputFormat.json:
        text = rows_to_json(table) + "\n"
    elif fmt == OutputFormat.csv:
        import io

        buf = io.BytesIO()
        pacsv.write_csv(table, buf)
        text = buf.getvalue().decode()
    else:
        text = None
    if out is not None:
        if text is None:  # a table written to a file is CSV-like text
            import io

            buf = io.BytesIO()
            pacsv.write_csv(table, buf)
            text = buf.getvalue().decode()
        out.write_text(text)
        typer.echo(f"wrote {table.num_rows:,} rows to {out}", err=True)
        return
    if text is not None:
        sys.stdout.write(text)
        return
    from rich.console import Console
    from rich.table import Table

    view = Table(show_header=True, header_style="bold")
    for name in table.column_names:
        view.add_column(name)
    for row in table.slice(0, TABLE_MAX_ROWS).to_pylist():
        view.add_row(*("" if v is None else str(v) for v in row.values()))
    console = Console()
    console.print(view)
    if table.num_rows > TABLE_MAX_ROWS:
        console.print(f"({table.num_rows:,} rows; first {TABLE_MAX_ROWS} shown, use --format "
                      "csv or json for all)")
    else:
        console.print(f"({table.num_rows:,} rows)")


def register(app: typer.Typer) -> None:
    app.command(name="query")(query_command)
