"""``replay report RUN_DIR [RUN_B]``: one self-contained interactive HTML report."""

from __future__ import annotations

from pathlib import Path

import typer


def report_cmd(
    run_dir: Path = typer.Argument(..., help="Run directory to report on (run A)."),
    run_b: Path | None = typer.Argument(None, help="Optional second run directory: adds a "
                                        "paired comparison section (differences B - A)."),
    out: Path | None = typer.Option(None, "--out", help="HTML file to write (default "
                                    "RUN_DIR/report.html)."),
    campaign: list[str] | None = typer.Option(None, "--campaign", help="Campaign id for the "
                                              "per-campaign charts; repeat for several "
                                              "(default: the 4 with the largest regret)."),
    setting: int = typer.Option(0, "--setting", help="setting_id of a sweep to show "
                                "(default 0)."),
    level: float = typer.Option(0.95, "--level", help="Confidence level of the comparison, "
                                "between 0 and 1 (default 0.95)."),
    force: bool = typer.Option(False, "--force", help="Compare with RUN_B even when the "
                               "catalogs or windows differ (default: refuse)."),
) -> None:
    """Write one HTML file that opens offline: summary table (CPM = price x 1000), relative
    regret across campaigns, regret decomposition, cumulative spend against target,
    multiplier paths, placement shares, budget-response curves, the counterfactual
    cautions and, with RUN_B, the paired comparison. Prints the file's path."""
    from replay.report import write_report

    path = write_report(run_dir, run_b, out=out, campaigns=campaign or None,
                        setting_id=setting, level=level, force=force)
    typer.echo(str(path))


def register(app: typer.Typer) -> None:
    app.command(name="report")(report_cmd)
