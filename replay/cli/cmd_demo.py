"""``replay demo``: the main job, end to end, on an invented marketplace."""

from __future__ import annotations

import shutil
import time
from pathlib import Path

import typer

#: The two rules the demo backtests: the "current" rule and a candidate.
DEMO_BASELINE_RULE = "dual-mirror"
DEMO_CANDIDATE_RULE = "ftl"

CAUTIONS = (
    "Counterfactual replay: competitors' bids and reserves are held fixed as logged; a rule "
    "that bids outside the logged range is extrapolating (see bids_above_logged)."
)


def demo(
    out: Path = typer.Option(Path("demo-output"), "--out", help="Output folder (created)."),
    campaigns: int = typer.Option(12, "--campaigns", min=1, help="Number of campaigns."),
    days: int = typer.Option(7, "--days", min=2, help="Days of logged auctions (the first is "
                             "the training window)."),
    seed: int = typer.Option(7, "--seed", help="Random seed of the invented scenario."),
    workers: int = typer.Option(0, "--workers", min=0,
                                help="Worker processes (0 = one per core)."),
) -> None:
    """Generate the demo marketplace, ingest it, compute hindsight optima, backtest two
    pacing rules, compare them and write the HTML report. Prints where everything is."""
    from replay.analysis.compare import compare
    from replay.analysis.hindsight import hindsight
    from replay.catalog import Catalog
    from replay.engines.local import backtest
    from replay.ingest import ingest
    from replay.report import write_report
    from replay.scenario import generate_scenario

    started = time.perf_counter()
    out.mkdir(parents=True, exist_ok=True)
    n_workers = workers or None

    typer.echo(f"1/6 generating the invented scenario ({campaigns} campaigns, {days} days)")
    files = generate_scenario(out / "scenario", campaigns=campaigns, days=days, seed=seed)

    catalog_dir = out / "catalog"
    if catalog_dir.exists():
        # The demo owns this folder; a fresh catalog keeps the run reproducible.
        shutil.rmtree(catalog_dir)
    typer.echo("2/6 ingesting into the catalog")
    report = ingest([files.auctions], catalog_dir, campaigns=files.campaigns, progress=True)
    typer.echo(
        f"    rows read {report.rows_read:,}, accepted {report.accepted:,}, "
        f"rejected {sum(report.rejected.values()):,}"
    )
    catalog = Catalog(catalog_dir)

    typer.echo("3/6 hindsight optimum per campaign (exact LP)")
    optimum = hindsight(catalog, workers=n_workers)
    optimum.write_parquet(out / "hindsight.parquet")

    runs = out / "runs"
    run_dirs = {}
    for step, rule in ((4, DEMO_BASELINE_RULE), (5, DEMO_CANDIDATE_RULE)):
        typer.echo(f"{step}/6 backtesting rule {rule}")
        run_dir = runs / rule
        if run_dir.exists():
            shutil.rmtree(run_dir)
        backtest(catalog, rule, seed=seed, out=run_dir, workers=n_workers)
        run_dirs[rule] = run_dir

    typer.echo("6/6 comparing the rules and writing the report")
    comparison = compare(run_dirs[DEMO_BASELINE_RULE], run_dirs[DEMO_CANDIDATE_RULE])
    report_path = write_report(
        run_dirs[DEMO_BASELINE_RULE], run_dirs[DEMO_CANDIDATE_RULE], out=out / "report.html"
    )

    typer.echo("")
    typer.echo(comparison.summary_text())
    typer.echo("")
    typer.echo(f"catalog     {catalog_dir}")
    typer.echo(f"hindsight   {out / 'hindsight.parquet'}")
    for rule, run_dir in run_dirs.items():
        typer.echo(f"run         {run_dir}  ({rule})")
    typer.echo(f"report      {report_path}")
    typer.echo(f"done in {time.perf_counter() - started:.1f} s. {CAUTIONS}")


def register(app: typer.Typer) -> None:
    app.command(name="demo")(demo)
