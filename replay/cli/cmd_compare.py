"""``replay compare RUN_A RUN_B``: paired differences with bootstrap intervals and a verdict."""

from __future__ import annotations

import json
from pathlib import Path

import typer


def compare_cmd(
    run_a: Path = typer.Argument(..., help="Run directory A (the baseline)."),
    run_b: Path = typer.Argument(..., help="Run directory B (the candidate); differences are "
                                 "B - A."),
    level: float = typer.Option(0.95, "--level", help="Confidence level of the bootstrap "
                                "interval, between 0 and 1 (default 0.95)."),
    force: bool = typer.Option(False, "--force", help="Compare even when the runs used "
                               "different catalogs or windows (default: refuse)."),
    metric: str = typer.Option("results", "--metric", help="Headline metric of the verdict: "
                               "results, spend, regret or relative_regret (default results)."),
    setting_a: int = typer.Option(0, "--setting-a", help="setting_id of run A to use when it "
                                  "is a sweep (default 0)."),
    setting_b: int = typer.Option(0, "--setting-b", help="setting_id of run B (default 0)."),
    seed: int = typer.Option(0, "--seed", help="Seed of the bootstrap resampling (default 0)."),
    as_json: bool = typer.Option(False, "--json", help="Print the comparison as JSON."),
) -> None:
    """Pair the campaigns both runs replayed and report the mean difference B - A of
    results, spend (currency), regret (results) and relative regret with a bootstrap
    confidence interval (scipy.stats.bootstrap, BCa) and a verdict: better, worse or
    no detectable difference at the chosen level."""
    from replay.analysis.compare import compare

    result = compare(run_a, run_b, level=level, force=force, metric=metric,
                     setting_a=setting_a, setting_b=setting_b, seed=seed)
    if as_json:
        typer.echo(json.dumps(result.to_dict(), indent=2))
    else:
        typer.echo(result.summary_text())


def register(app: typer.Typer) -> None:
    app.command(name="compare")(compare_cmd)
