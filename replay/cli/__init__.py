"""The ``replay`` command line. Each command lives in ``cmd_<name>.py`` with ``register(app)``."""

from __future__ import annotations

import importlib
import importlib.util
import sys

import typer

from replay.errors import ReplayError

#: Order of commands in ``replay --help``; a module missing on disk is skipped.
COMMAND_ORDER = (
    "demo", "ingest", "query", "hindsight", "backtest", "whatif", "compare", "report",
    "bench", "rules",
)

app = typer.Typer(
    name="replay",
    help="Offline auction-log replay: hindsight optima and counterfactual backtests of "
    "bid rules. Prices are currency per impression; budgets are currency per flight.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode="markdown",
)

_state = {"debug": False}


@app.callback()
def _root(
    debug: bool = typer.Option(False, "--debug", help="Show the full traceback on errors."),
) -> None:
    _state["debug"] = debug


def _register_commands() -> None:
    for name in COMMAND_ORDER:
        module_name = f"replay.cli.cmd_{name}"
        if importlib.util.find_spec(module_name) is None:
            continue
        importlib.import_module(module_name).register(app)


_register_commands()


def main(argv: list[str] | None = None) -> None:
    """Console entry point: one clear line and exit code 2 on a user error."""
    args = sys.argv[1:] if argv is None else argv
    debug = "--debug" in args
    try:
        app(args=args, standalone_mode=True)
    except ReplayError as exc:
        if debug:
            raise
        typer.echo(f"error: {exc}", err=True)
        raise SystemExit(2) from None
