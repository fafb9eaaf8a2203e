"""``replay whatif CATALOG --campaign ID [changes]``: one campaign replayed with its current
setting beside a changed one (budget, cap, rule, placements), each with its own optimum."""

from __future__ import annotations

import json
from pathlib import Path

import typer

from replay.cli import options
from replay.errors import UsageError


def whatif_cmd(
    catalog: Path = typer.Argument(..., help="Catalog folder written by `replay ingest`."),
    campaign: str = typer.Option(..., "--campaign", help="Campaign id (as in the campaign "
                                 "table)."),
    budget: float = typer.Option(None, "--budget", help="Changed budget, currency over the "
                                 "flight, > 0 (default: the campaign's budget)."),
    cap: str = typer.Option(None, "--cap", help="Changed cost-per-result cap, currency per "
                            "result, > 0, or 'none' to remove it (default: the campaign's)."),
    rule: str = typer.Option(None, "--rule", help="Changed bid rule, a name from `replay "
                             "rules` or module:Class (default: the baseline rule)."),
    set_: list[str] = typer.Option(None, "--set", help="Parameter key=value of the changed "
                                   "rule; repeat for several."),
    exclude_placement: list[str] = typer.Option(None, "--exclude-placement", help="Do not bid "
                                                "on this placement in the changed replay; "
                                                "repeat for several."),
    baseline_rule: str = typer.Option("dual-mirror", "--baseline-rule", help="Rule of the "
                                      "current setting (default dual-mirror, default "
                                      "parameters)."),
    baseline_set: list[str] = typer.Option(None, "--baseline-set", help="Parameter key=value "
                                           "of the baseline rule; repeat for several."),
    start: str = options.START,
    end: str = options.END,
    train_days: float = options.TRAIN_DAYS,
    every: str = options.EVERY,
    every_n: int = options.EVERY_N,
    charges: str = options.CHARGES,
    seed: int = options.SEED,
    shading: str = options.SHADING,
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object with the "
                                 "baseline and changed sides."),
    engine: str = options.ENGINE,
    master: str = options.MASTER,
) -> None:
    """What if this campaign had bid differently? Replays it as it is (baseline) and with
    the changes, each against the hindsight optimum of its own rows, budget and cap."""
    from rich.table import Table

    from replay.cli.cmd_backtest import _console
    from replay.engines import check_engine, whatif
    from replay.engines.windows import parse_set
    from replay.rules.registry import get_rule

    if every is not None and every_n is not None:
        raise UsageError("--every and --every-n exclude each other; give one of them")
    check_engine(engine, master)
    base_cls = get_rule(baseline_rule)
    new_cls = get_rule(rule) if rule is not None else base_cls
    params = parse_set(set_ or [], new_cls)
    base_params = parse_set(baseline_set or [], base_cls)
    res = whatif(catalog, campaign, budget=budget, cap=cap, rule=rule, params=params,
                 exclude_placements=tuple(exclude_placement or ()), baseline_rule=baseline_rule,
                 baseline_params=base_params, start=start, end=end, train_days=train_days,
                 every=every if every is not None else "15min", every_n=every_n,
                 charges=charges, seed=seed, shading=shading, engine=engine, master=master)
    if as_json:
        typer.echo(json.dumps(res.to_dict(), indent=2))
        return
    b, c = res.baseline, res.changed
    table = Table(title=f"What if: campaign {campaign}")
    table.add_column("metric")
    table.add_column(f"baseline ({b['rule']})", justify="right")
    table.add_column(f"changed ({c['rule']})", justify="right")
    table.add_column("change", justify="right")
    for row in res.table.iter_rows(named=True):
        table.add_row(row["metric"], row["baseline"] or "-", row["changed"] or "-",
                      row["change"] or "")
    _console().print(table)
    def share(x: object) -> str:
        return f"{x:.2%}" if isinstance(x, float) else "-"

    typer.echo(f"cautions: competitors' bids are held fixed as logged; bids above the logged "
               f"range: baseline {share(b.get('bids_above_logged'))}, changed "
               f"{share(c.get('bids_above_logged'))}")


def register(app: typer.Typer) -> None:
    app.command(name="whatif")(whatif_cmd)
