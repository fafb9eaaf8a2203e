"""``replay hindsight CATALOG``: the best possible outcome per campaign or group in hindsight."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import typer

from replay.cli import options
from replay.errors import UsageError


def _clean(x: Any) -> Any:
    # JSON has no NaN or infinity: write null.
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, list):
        return [_clean(v) for v in x]
    if isinstance(x, dict):
        return {k: _clean(v) for k, v in x.items()}
    return x


def json_rows(df: Any, with_curve: bool) -> list[dict[str, Any]]:
    """The ``--json`` objects: exactly JSON_KEYS (plus ``curve`` when asked)."""
    from replay.analysis.hindsight import JSON_KEYS

    keys = list(JSON_KEYS) + (["curve"] if with_curve else [])
    return [_clean({k: r.get(k) for k in keys}) for r in df.select(keys).to_dicts()]


def _write(df: Any, out: Path) -> None:
    import polars as pl

    suffix = out.suffix.lower()
    if suffix == ".parquet":
        df.write_parquet(out)
    elif suffix == ".csv":
        # CSV has no nested columns: write them as JSON text.
        nested = [c for c, t in df.schema.items() if isinstance(t, pl.List | pl.Struct)]
        flat = df.with_columns([
            pl.Series(c, [json.dumps(_clean(v)) if v is not None else None
                          for v in df[c].to_list()], dtype=pl.String) for c in nested])
        flat.write_csv(out)
    else:
        raise UsageError(f"--out {out}: unknown file type {out.suffix!r}; use .parquet or .csv")


def _table(df: Any) -> None:
    from rich.console import Console
    from rich.table import Table

    table = Table(title="Hindsight optimum per campaign or group (exact LP)")
    cols = [("campaign_id", "campaign / group"), ("budget", "budget"),
            ("lambda", "lambda (results/cur.)"), ("results", "results"), ("spend", "spend"),
            ("wins", "wins"), ("cost_per_result", "cost/result"),
            ("upper_bound", "upper bound"), ("binding", "binding")]
    for _, title in cols:
        table.add_column(title, justify="left" if title.startswith("camp") else "right")
    for r in df.filter(df["error"].is_null()).to_dicts():
        cells = []
        for key, _ in cols:
            v = r[key]
            if isinstance(v, float):
                cells.append(f"{v:,.6g}")
            else:
                cells.append("-" if v is None else str(v))
        if len(r["members"] or []) > 1:
            cells[0] += f" ({len(r['members'])} campaigns)"
        table.add_row(*cells)
    console = Console()
    if not console.is_terminal:
        console = Console(width=160)  # pipes and files: do not squeeze to 80 columns
    console.print(table)


def hindsight_cmd(
    catalog: Path = typer.Argument(..., help="Catalog folder written by `replay ingest`."),
    campaign: list[str] = typer.Option(None, "--campaign", help="Campaign id to solve; repeat "
                                       "for several (default: every campaign; a member of a "
                                       "group selects its whole group)."),
    start: str = typer.Option(None, "--start", help="Window start, ISO-8601 UTC, inclusive "
                              "(default: the start of the log)."),
    end: str = typer.Option(None, "--end", help="Window end, ISO-8601 UTC, exclusive "
                            "(default: the end of the log)."),
    budget_scale: float = typer.Option(1.0, "--budget-scale", help="Multiply every budget "
                                       "(currency over the flight) by this factor, > 0 "
                                       "(default 1.0)."),
    curve: str = typer.Option(None, "--curve", help="Budget-response curve LO:HI:N: N budget "
                              "multipliers from LO to HI in geometric steps, e.g. 0.25:4:16 "
                              "(default: none)."),
    as_json: bool = typer.Option(False, "--json", help="Print a JSON list, one object per "
                                 "campaign or group."),
    out: Path = typer.Option(None, "--out", help="Also write the full table to FILE "
                             "(.parquet or .csv)."),
    workers: int = typer.Option(None, "--workers", min=1, help="Worker processes (default: "
                                "the number of CPUs)."),
    engine: str = options.ENGINE,
    master: str = options.MASTER,
) -> None:
    """Exact hindsight optimum per campaign (or group sharing a budget): results, spend
    (currency), wins, cost per result, the LP upper bound (results), the budget multiplier
    lambda (results per currency) and which constraint binds (budget, cap or none)."""
    from replay.analysis.hindsight import CurveSpec
    from replay.engines import check_engine, hindsight

    check_engine(engine, master)
    if not (budget_scale > 0 and math.isfinite(budget_scale)):
        raise UsageError(f"--budget-scale {budget_scale}: must be a positive number")
    spec = None
    if curve is not None:
        try:
            spec = CurveSpec.parse(curve)
        except ValueError as exc:
            raise UsageError(f"--curve: {exc}") from None
    if out is not None and out.suffix.lower() not in (".parquet", ".csv"):
        raise UsageError(f"--out {out}: unknown file type {out.suffix!r}; use .parquet or .csv")
    df = hindsight(catalog, campaign_ids=campaign or None, start=start, end=end,
                   budget_scale=budget_scale, curve=spec, workers=workers,
                   progress=not as_json, engine=engine, master=master)
    for msg in df.filter(df["error"].is_not_null())["error"].to_list():
        typer.echo(f"warning: {msg}", err=True)
    if out is not None:
        _write(df, out)
    if as_json:
        typer.echo(json.dumps(json_rows(df.filter(df["error"].is_null()), spec is not None),
                              indent=2))
    else:
        _table(df)


def register(app: typer.Typer) -> None:
    app.command(name="hindsight")(hindsight_cmd)
