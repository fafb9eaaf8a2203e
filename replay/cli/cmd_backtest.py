"""``replay backtest CATALOG --rule NAME --out RUN_DIR``: replay a bid rule (or a sweep of
settings) over many campaigns against their hindsight optima; writes a run folder."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import typer

from replay.cli import options
from replay.errors import UsageError

CAUTION = ("cautions: competitors' bids are held fixed as logged; {share} of bids were above "
           "the largest logged minimum winning price of their placement (extrapolation)")


def caution_line(totals: Any) -> str:
    """The one-line counterfactual caution under every backtest table."""
    share = 0.0
    if totals.height:
        x = totals["bids_above_logged"].drop_nulls()
        share = float(x.mean()) if x.len() else 0.0
    return CAUTION.format(share=f"{share:.2%}")


def _fmt(v: Any, pct: bool = False) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    if pct:
        return f"{v:.2%}"
    if isinstance(v, float):
        return f"{v:,.5g}"
    return str(v)


def _console() -> Any:
    from rich.console import Console

    console = Console()
    if not console.is_terminal:
        console = Console(width=170)  # pipes and files: do not squeeze to 80 columns
    return console


def print_campaign_table(result: Any, title: str) -> None:
    """Per-campaign totals beside the optimum (one setting)."""
    from rich.table import Table

    table = Table(title=title)
    cols = [("campaign_id", "campaign", False), ("results", "results", False),
            ("opt_upper_bound", "optimum", False), ("regret", "regret", False),
            ("relative_regret", "rel. regret", True), ("spend", "spend", False),
            ("budget_used", "budget used", True), ("cost_per_result", "cost/result", False),
            ("wins", "wins", False), ("regret_unspent", "unspent", False),
            ("regret_overpayment", "overpaid", False),
            ("regret_misallocation", "misalloc.", False),
            ("regret_cap_slack", "cap slack", False),
            ("pacing_error_max", "max pacing gap", False), ("cap_violated", "cap viol.", False)]
    for _, head, _ in cols:
        table.add_column(head, justify="left" if head == "campaign" else "right")
    for row in result.totals.iter_rows(named=True):
        table.add_row(*[_fmt(row[k], pct) for k, _, pct in cols])
    _console().print(table)


def print_ranking(result: Any) -> None:
    """Settings ranked by mean relative regret, with its spread across campaigns."""
    from rich.table import Table

    rank = result.ranking()
    table = Table(title="Settings ranked by mean relative regret (lower is better)")
    cols = [("rank", "rank", False), ("setting_id", "id", False), ("label", "setting", False),
            ("campaigns", "campaigns", False), ("mean_relative_regret", "mean", True),
            ("std_relative_regret", "std", True), ("p10_relative_regret", "p10", True),
            ("p90_relative_regret", "p90", True), ("results", "results", False),
            ("spend", "spend", False), ("mean_budget_used", "budget used", True)]
    for _, head, _ in cols:
        table.add_column(head, justify="left" if head == "setting" else "right")
    for row in rank.iter_rows(named=True):
        table.add_row(*[_fmt(row.get(k), pct) for k, _, pct in cols])
    _console().print(table)


def backtest_cmd(
    catalog: Path = typer.Argument(..., help="Catalog folder written by `replay ingest`."),
    rule: str = typer.Option(..., "--rule", help="Bid rule: a name from `replay rules` or "
                             "path.to.module:ClassName (or ./file.py:ClassName)."),
    set_: list[str] = typer.Option(None, "--set", help="Rule parameter key=value (units as "
                                   "listed by `replay rules`); repeat for several."),
    campaign: list[str] = typer.Option(None, "--campaign", help="Campaign id; repeat for "
                                       "several (default: every campaign with a budget)."),
    start: str = options.START,
    end: str = options.END,
    train_days: float = options.TRAIN_DAYS,
    train_start: str = typer.Option(None, "--train-start", help="Explicit training window "
                                    "start, ISO-8601 UTC (default: from --train-days)."),
    train_end: str = typer.Option(None, "--train-end", help="Explicit training window end, "
                                  "ISO-8601 UTC, at or before --start (default: --start)."),
    every: str = options.EVERY,
    every_n: int = options.EVERY_N,
    charges: str = options.CHARGES,
    seed: int = options.SEED,
    sweep: list[str] = typer.Option(None, "--sweep", help="Grid axis key=v1,v2,... (rule "
                                    "parameters, every, every_n, charges); repeat for a "
                                    "cartesian grid."),
    budget_scale: float = typer.Option(1.0, "--budget-scale", help="Multiply every budget "
                                       "(currency over the flight) by this factor, > 0 "
                                       "(default 1.0)."),
    shading: str = options.SHADING,
    workers: int = typer.Option(0, "--workers", min=0, help="Worker processes (0 = one per "
                                "core; default 0)."),
    resume: bool = typer.Option(False, "--resume", help="Finish the interrupted run in --out "
                                "without redoing finished campaigns."),
    out: Path = typer.Option(..., "--out", help="Run folder to write (new or empty; see "
                             "DEVELOPERS.md for its layout)."),
    as_json: bool = typer.Option(False, "--json", help="Print a JSON list: one object per "
                                 "campaign (per campaign and setting with --sweep)."),
    engine: str = options.ENGINE,
    master: str = options.MASTER,
) -> None:
    """Replay a bid rule over logged auctions, campaign by campaign, and compare each with
    its hindsight optimum over the same window and budget: results, spend (currency),
    regret (results) and its split, pacing error (currency). With --sweep, every grid
    point runs on every campaign and the settings are ranked by mean relative regret."""
    from replay.engines import backtest, check_engine
    from replay.engines.windows import parse_set, parse_sweep
    from replay.rules.registry import get_rule

    if every is not None and every_n is not None:
        raise UsageError("--every and --every-n exclude each other; give one of them")
    check_engine(engine, master)
    rule_cls = get_rule(rule)
    params = parse_set(set_ or [], rule_cls)
    axes = parse_sweep(sweep or [], rule_cls)
    result = backtest(catalog, rule, params, campaigns=campaign or None, start=start, end=end,
                      train_days=train_days, train_start=train_start, train_end=train_end,
                      every=every if every is not None else "15min", every_n=every_n,
                      charges=charges, seed=seed, out=out, sweep=axes or None,
                      workers=workers, resume=resume, budget_scale=budget_scale,
                      shading=shading, engine=engine, master=master)
    for cid, why in result.skipped.items():
        typer.echo(f"warning: campaign {cid} skipped: {why}", err=True)
    if as_json:
        typer.echo(json.dumps(result.records(), indent=2))
        return
    if result.settings.height > 1:
        print_ranking(result)
    else:
        print_campaign_table(result, f"Backtest of {rule} against the hindsight optimum")
    typer.echo(caution_line(result.totals))
    typer.echo(f"run folder: {result.run_dir}")


def register(app: typer.Typer) -> None:
    app.command(name="backtest")(backtest_cmd)
