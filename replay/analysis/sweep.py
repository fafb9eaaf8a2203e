"""Parameter sweeps: the grid of settings and the ranking of settings by relative regret.

A sweep is a mapping ``axis -> values`` (rule parameters, plus the engine keys ``every``,
``every_n`` and ``charges``). The grid is the cartesian product, in the order the axes are
given, the last axis varying fastest; ``setting_id`` numbers the grid points from 0. A run
without a sweep has one setting, ``setting_id`` 0.
"""

from __future__ import annotations

import itertools
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl


@dataclass(frozen=True)
class Setting:
    """One grid point: its id, the sweep values that define it, the full rule parameters
    and the engine settings (schedule and charge mode)."""

    setting_id: int
    axes: dict[str, Any]  # the swept values only
    params: dict[str, Any]  # base parameters overridden by the swept rule parameters
    every: str | None  # duration text ("15min") or None with every_n
    every_n: int | None
    charges: str
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def label(self) -> str:
        if not self.axes:
            return "base"
        return " ".join(f"{k}={_text(v)}" for k, v in self.axes.items())


def _text(v: Any) -> str:
    if isinstance(v, float):
        return f"{v:g}"
    if isinstance(v, dict):
        return ",".join(f"{k}:{_text(x)}" for k, x in v.items())
    return str(v)


def expand_grid(sweep: Mapping[str, Sequence[Any]] | None, *, params: Mapping[str, Any],
                every: str | None, every_n: int | None, charges: str) -> list[Setting]:
    """The settings of a sweep (one base setting without a sweep).

    ``every``/``every_n`` on an axis replace the base schedule (the other kind is cleared).
    """
    axes = list((sweep or {}).items())
    if not axes:
        return [Setting(0, {}, dict(params), every, every_n, charges)]
    names = [k for k, _ in axes]
    out = []
    for sid, combo in enumerate(itertools.product(*[list(v) for _, v in axes])):
        point = dict(zip(names, combo, strict=True))
        p = dict(params)
        ev, en, ch = every, every_n, charges
        for key, val in point.items():
            if key == "every":
                ev, en = val, None
            elif key == "every_n":
                ev, en = None, int(val)
            elif key == "charges":
                ch = val
            else:
                p[key] = val
        out.append(Setting(sid, point, p, ev, en, ch))
    return out


def _cell(v: Any) -> Any:
    if isinstance(v, dict | list | tuple):
        return json.dumps(v, sort_keys=True)
    return v


def settings_table(settings: Sequence[Setting]) -> pl.DataFrame:
    """``settings.parquet``: ``setting_id``, ``label``, one column per swept axis (its
    value; durations as given, e.g. ``15min``), then the effective ``every``,
    ``every_n``, ``charges`` and ``params`` (all rule parameters as JSON text)."""
    axis_names: list[str] = []
    for s in settings:
        for k in s.axes:
            if k not in axis_names:
                axis_names.append(k)
    cols: dict[str, list[Any]] = {"setting_id": [s.setting_id for s in settings],
                                  "label": [s.label for s in settings]}
    for k in axis_names:
        if k in ("every", "every_n", "charges"):
            continue
        cols[k] = [_cell(s.axes.get(k)) for s in settings]
    cols["every"] = [s.every for s in settings]
    cols["every_n"] = [s.every_n for s in settings]
    cols["charges"] = [s.charges for s in settings]
    cols["params"] = [json.dumps(_plain(s.params), sort_keys=True) for s in settings]
    df = pl.DataFrame(cols, strict=False)
    return df.with_columns(pl.col("setting_id").cast(pl.Int32),
                           pl.col("every").cast(pl.String), pl.col("every_n").cast(pl.Int64))


def _plain(x: Any) -> Any:
    if isinstance(x, Mapping):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_plain(v) for v in x]
    if isinstance(x, float) and not np.isfinite(x):
        return None
    if hasattr(x, "item"):
        return x.item()
    return x


def rank_settings(totals: pl.DataFrame, settings: pl.DataFrame | None = None) -> pl.DataFrame:
    """Settings ranked by mean relative regret across campaigns (best first).

    Columns: ``rank``, ``setting_id``, ``label`` (when ``settings`` is given),
    ``campaigns`` (with a defined relative regret), ``mean_relative_regret``,
    ``std_relative_regret`` (ddof=1; null with one campaign), ``p10_relative_regret``,
    ``p90_relative_regret`` (linear interpolation), ``mean_regret``, ``results``,
    ``spend`` (sums), ``mean_budget_used``. Ties keep the lower ``setting_id`` first.
    """
    rr = pl.col("relative_regret")
    g = (totals.lazy().group_by("setting_id").agg(
        campaigns=rr.drop_nulls().len().cast(pl.Int64),
        mean_relative_regret=rr.mean(),
        std_relative_regret=rr.std(ddof=1),
        p10_relative_regret=rr.quantile(0.10, interpolation="linear"),
        p90_relative_regret=rr.quantile(0.90, interpolation="linear"),
        mean_regret=pl.col("regret").mean(),
        results=pl.col("results").sum(),
        spend=pl.col("spend").sum(),
        mean_budget_used=pl.col("budget_used").mean(),
    ).collect() if totals.height else pl.DataFrame(schema={
        "setting_id": pl.Int32, "campaigns": pl.Int64, "mean_relative_regret": pl.Float64,
        "std_relative_regret": pl.Float64, "p10_relative_regret": pl.Float64,
        "p90_relative_regret": pl.Float64, "mean_regret": pl.Float64,
        "results": pl.Float64, "spend": pl.Float64, "mean_budget_used": pl.Float64}))
    g = g.sort(["mean_relative_regret", "setting_id"], nulls_last=True)
    g = g.with_row_index("rank", offset=1).with_columns(pl.col("rank").cast(pl.Int64))
    if settings is not None and settings.height and "label" in settings.columns:
        g = g.join(settings.select("setting_id", "label"), on="setting_id", how="left")
        cols = ["rank", "setting_id", "label"]
        g = g.select(cols + [c for c in g.columns if c not in cols])
    return g
