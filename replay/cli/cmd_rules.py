"""``replay rules``: the bid rules, their parameters, units and defaults."""

from __future__ import annotations

import json

import typer

from replay.rules.base import BidRule


def rule_rows(rules: list[type[BidRule]]) -> list[dict[str, object]]:
    """One row per (rule, parameter); a rule without parameters gets one row."""
    rows: list[dict[str, object]] = []
    for cls in rules:
        specs = cls.param_specs()
        if not specs:
            rows.append({"rule": cls.name, "summary": cls.summary, "parameter": None,
                         "default": None, "unit": None, "allowed": None, "doc": None})
        for key, spec in specs.items():
            default = spec.default
            if default is None:
                default = "none" if spec.type_name == "dict" else "learned in fit"
            rows.append({"rule": cls.name, "summary": cls.summary, "parameter": key,
                         "default": default, "unit": spec.unit, "allowed": spec.allowed(),
                         "doc": spec.doc})
    return rows


def rules_command(
    rule: str = typer.Argument(None, help="Show only this rule (a name or module:Class). "
                               "Default: every built-in rule."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON (a list of objects: rule, "
                                 "summary, parameter, default, unit, allowed, doc)."),
) -> None:
    """List the bid rules with their parameters, units and defaults (set with --set k=v)."""
    from replay.rules.registry import get_rule, list_rules

    rules = [get_rule(rule)] if rule else list_rules()
    rows = rule_rows(rules)
    if as_json:
        typer.echo(json.dumps(rows, indent=2, default=str))
        return
    from rich.console import Console
    from rich.table import Table

    table = Table(title="Bid rules (parameters: replay backtest --rule NAME --set key=value)")
    for col in ("rule", "parameter", "default", "unit", "allowed", "doc"):
        table.add_column(col, overflow="fold")
    last = None
    for r in rows:
        name = r["rule"] if r["rule"] != last else ""
        if name:
            table.add_section()
        last = r["rule"]
        default = r["default"]
        table.add_row(str(name), str(r["parameter"] or "-"),
                      str(default if default is not None else "-"),
                      str(r["unit"] or "-"), str(r["allowed"] or "-"),
                      str(r["doc"] or r["summary"]))
    Console().print(table)
    for cls in rules:
        typer.echo(f"{cls.name}: {cls.summary}")


def register(app: typer.Typer) -> None:
    app.command(name="rules")(rules_command)
