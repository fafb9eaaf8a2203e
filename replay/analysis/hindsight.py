"""Hindsight optima for every campaign and group of a catalog (or for arrays in memory).

One row per campaign, or per group for campaigns sharing a budget (``group_id``). A group
is solved as a whole: selecting any member selects the group, its budget is the sum of the
members' budgets (each member brings its budget to the shared pool), and where two members
bid on the same ``request_id`` at most one wins it (``kernels.group``). Caps are per
campaign and are not applied to groups.

Each campaign's rows are the catalog rows inside both the requested window and the
campaign's flight (``start``/``end`` of the campaign table); the budget is the campaign's
budget times ``budget_scale`` (not prorated to the window).

The per-unit work is the pure function :func:`solve_campaign_arrays`, shared by the local
process pool here and by other engines.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from multiprocessing import get_context
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from replay.kernels.group import request_codes, solve_group
from replay.kernels.hindsight import budget_curve, solve
from replay.schema import CampaignArrays, CampaignSpec

#: Keys of one result row, in order (``curve`` and ``placements`` are added when present).
ROW_KEYS = ("campaign_id", "members", "budget", "lambda", "results", "spend", "wins",
            "cost_per_result", "upper_bound", "binding", "mu", "gap", "surplus", "rows",
            "error")
#: Keys of the JSON output of ``replay hindsight --json`` (exactly these, plus ``curve``).
JSON_KEYS = ("campaign_id", "budget", "lambda", "results", "spend", "wins",
             "cost_per_result", "upper_bound", "binding")


@dataclass(frozen=True)
class CurveSpec:
    """Budget multipliers ``lo`` to ``hi`` in ``n`` geometric steps (both ends included)."""

    lo: float
    hi: float
    n: int

    def scales(self) -> np.ndarray:
        if self.n == 1:
            return np.array([self.lo])
        return np.geomspace(self.lo, self.hi, self.n)

    @classmethod
    def parse(cls, text: str) -> CurveSpec:
        """``LO:HI:N``, for example ``0.25:4:16``; raises ValueError with the reason."""
        parts = text.split(":")
        if len(parts) != 3:
            raise ValueError(f"curve {text!r}: expected LO:HI:N, for example 0.25:4:16")
        try:
            lo, hi, n = float(parts[0]), float(parts[1]), int(parts[2])
        except ValueError:
            raise ValueError(f"curve {text!r}: LO and HI must be numbers and N an integer, "
                             "for example 0.25:4:16") from None
        if not (0 < lo <= hi) or not math.isfinite(hi) or not (1 <= n <= 1000):
            raise ValueError(f"curve {text!r}: need 0 < LO <= HI (budget multipliers) and "
                             "1 <= N <= 1000")
        return cls(lo, hi, n)


def _error_row(unit_id: str, members: Sequence[str], budget: float | None,
               message: str) -> dict[str, Any]:
    row: dict[str, Any] = {k: None for k in ROW_KEYS}
    row.update(campaign_id=unit_id, members=list(members), budget=budget, error=message,
               rows=0)
    return row


def _placement_rows(placements: Sequence[str], results: np.ndarray, spend: np.ndarray,
                    wins: np.ndarray, marginal: np.ndarray) -> list[dict[str, Any]]:
    out = []
    for i, name in enumerate(placements):
        if wins[i] == 0 and spend[i] == 0:
            continue
        m = float(marginal[i])
        out.append({"placement": name, "results": float(results[i]), "spend": float(spend[i]),
                    "wins": int(wins[i]),
                    "marginal_cost_per_result": None if math.isnan(m) else m})
    return out


def solve_campaign_arrays(arrays_or_list: CampaignArrays | Sequence[CampaignArrays],
                          spec: CampaignSpec, *, budget_scale: float = 1.0,
                          curve: CurveSpec | None = None, start_us: int | None = None,
                          end_us: int | None = None) -> dict[str, Any]:
    """Hindsight optimum of one campaign (one CampaignArrays) or one group (a list).

    ``spec`` gives the unit's id (campaign or group id), budget (currency), cap and flight;
    rows are cut to ``[start_us, end_us)`` and to the flight. Pure: no I/O. Returns a row
    dict with :data:`ROW_KEYS` plus ``curve`` (list of dicts, when asked) and
    ``placements`` (per placement results, spend, wins, marginal cost per result). Bad
    input (no rows, a budget that is not a positive number) gives a row whose ``error``
    names the campaign.
    """
    is_group = not isinstance(arrays_or_list, CampaignArrays)
    parts = list(arrays_or_list) if is_group else [arrays_or_list]
    members = [a.campaign_id for a in parts]
    kind = "group" if is_group else "campaign"
    uid = spec.campaign_id
    budget = spec.budget
    if budget is None or not isinstance(budget, int | float) or not math.isfinite(budget) \
            or budget <= 0:
        return _error_row(uid, members, None,
                          f"{kind} {uid}: budget must be a positive number, got {budget!r}")
    if not (math.isfinite(budget_scale) and budget_scale > 0):
        return _error_row(uid, members, None,
                          f"{kind} {uid}: budget_scale must be a positive number, "
                          f"got {budget_scale!r}")
    budget = float(budget) * float(budget_scale)
    lo = max([x for x in (start_us, spec.start_us) if x is not None], default=None)
    hi = min([x for x in (end_us, spec.end_us) if x is not None], default=None)
    parts = [a.window(lo, hi) for a in parts]
    n_rows = sum(len(a) for a in parts)
    if n_rows == 0:
        return _error_row(uid, members, budget,
                          f"{kind} {uid}: no auction rows in the window")
    placements = parts[0].placements
    n_pl = max([len(placements)] + [int(a.placement_code.max()) + 1 for a in parts if len(a)])
    if len(placements) < n_pl:
        placements = tuple(placements) + tuple(f"#{i}" for i in range(len(placements), n_pl))

    row: dict[str, Any] = {"campaign_id": uid, "members": members, "budget": budget,
                           "rows": n_rows, "error": None}
    if is_group:
        value = np.concatenate([a.value for a in parts])
        price = np.concatenate([a.min_win_price for a in parts])
        pcode = np.concatenate([a.placement_code for a in parts]).astype(np.int64)
        member = np.concatenate([np.full(len(a), i, np.int64) for i, a in enumerate(parts)])
        rid = None
        if any(a.request_id is not None for a in parts):
            rid = np.concatenate([a.request_id if a.request_id is not None
                                  else np.full(len(a), None, dtype=object) for a in parts])
        codes = request_codes(rid, n_rows)
        g = solve_group(value, price, codes, budget, member=member, n_members=len(parts),
                        placement_code=pcode, n_placements=n_pl)
        sol = g.solution
        row["placements"] = _placement_rows(placements, g.placement_results,
                                            g.placement_spend, g.placement_wins,
                                            g.placement_marginal_cost_per_result)
        row["member_breakdown"] = [
            {"campaign_id": m, "results": float(g.member_results[i]),
             "spend": float(g.member_spend[i]), "wins": int(g.member_wins[i])}
            for i, m in enumerate(members)]
        curve_v, curve_p = g.item_value, g.item_cost
        cap = None
    else:
        a = parts[0]
        cap = spec.max_cost_per_result
        try:
            sol = solve(a.value, a.min_win_price, budget, cap, return_mask=True)
        except ValueError as exc:
            return _error_row(uid, members, budget, f"campaign {uid}: {exc}")
        taken = sol.taken
        pc = a.placement_code.astype(np.int64)[taken]
        v, p = a.value[taken], a.min_win_price[taken]
        marg = np.full(n_pl, np.nan)
        priced = p > 0
        if priced.any():
            np.fmax.at(marg, pc[priced], p[priced] / v[priced])
        row["placements"] = _placement_rows(
            placements, np.bincount(pc, weights=v, minlength=n_pl),
            np.bincount(pc, weights=p, minlength=n_pl), np.bincount(pc, minlength=n_pl),
            marg)
        curve_v, curve_p = a.value, a.min_win_price
    row.update({
        "lambda": sol.lambda_, "results": sol.results, "spend": sol.spend, "wins": sol.wins,
        "cost_per_result": None if math.isnan(sol.cost_per_result) else sol.cost_per_result,
        "upper_bound": sol.upper_bound, "binding": sol.binding, "mu": sol.mu,
        "gap": sol.gap, "surplus": sol.surplus,
    })
    if curve is not None:
        scales = curve.scales()
        c = budget_curve(curve_v, curve_p, budget * scales, cap)
        row["curve"] = [
            {"budget_scale": float(s), "budget": float(c["budget"][i]),
             "results": float(c["results"][i]), "upper_bound": float(c["upper_bound"][i]),
             "lambda": float(c["lambda"][i])}
            for i, s in enumerate(scales)]
    return row


# --------------------------------------------------------------------------- catalog runs

@dataclass(frozen=True)
class _Unit:
    """One solve: a campaign, or a group with its members (specs carry flights)."""

    unit_id: str
    members: tuple[str, ...]
    specs: tuple[CampaignSpec | None, ...]
    is_group: bool


def _plan_units(catalog: Any, campaign_ids: Sequence[str] | None) -> list[_Unit]:
    specs = catalog.campaigns()
    in_log = set(catalog.campaign_ids())
    wanted = sorted(in_log | set(specs)) if campaign_ids is None else list(campaign_ids)
    groups: dict[str, list[str]] = {}
    for cid, s in specs.items():
        if s.group_id is not None:
            groups.setdefault(s.group_id, []).append(cid)
    units: list[_Unit] = []
    seen: set[str] = set()
    for cid in wanted:
        s = specs.get(cid)
        if s is not None and s.group_id is not None:
            gid = s.group_id
            if gid in seen:
                continue
            seen.add(gid)
            mem = tuple(sorted(groups[gid]))
            units.append(_Unit(gid, mem, tuple(specs[m] for m in mem), True))
        elif cid not in seen:
            seen.add(cid)
            units.append(_Unit(cid, (cid,), (s,), False))
    return units


def _solve_unit(catalog: Any, unit: _Unit, start_us: int | None, end_us: int | None,
                budget_scale: float, curve: CurveSpec | None) -> dict[str, Any]:
    if unit.specs[0] is None:
        return _error_row(unit.unit_id, unit.members, None,
                          f"campaign {unit.unit_id}: not in the campaign table, so it has no "
                          "budget (add it to campaigns.parquet)")
    if unit.is_group:
        parts = []
        for s in unit.specs:
            lo = max([x for x in (start_us, s.start_us) if x is not None], default=None)
            hi = min([x for x in (end_us, s.end_us) if x is not None], default=None)
            parts.append(catalog.arrays(s.campaign_id, lo, hi, request_ids=True))
        budgets = [s.budget for s in unit.specs]
        bad = [s.campaign_id for s in unit.specs
               if s.budget is None or not math.isfinite(s.budget) or s.budget <= 0]
        if bad:
            return _error_row(unit.unit_id, unit.members, None,
                              f"group {unit.unit_id}: budget of member(s) {', '.join(bad)} "
                              "must be a positive number")
        spec = CampaignSpec(unit.unit_id, float(sum(budgets)))
        return solve_campaign_arrays(parts, spec, budget_scale=budget_scale, curve=curve)
    spec = unit.specs[0]
    arrays = catalog.arrays(spec.campaign_id, *_window(start_us, end_us, spec))
    return solve_campaign_arrays(arrays, spec, budget_scale=budget_scale, curve=curve,
                                 start_us=start_us, end_us=end_us)


def _window(start_us: int | None, end_us: int | None,
            spec: CampaignSpec) -> tuple[int | None, int | None]:
    lo = max([x for x in (start_us, spec.start_us) if x is not None], default=None)
    hi = min([x for x in (end_us, spec.end_us) if x is not None], default=None)
    return lo, hi


def _run_chunk(catalog: Any, units: list[_Unit], start_us: int | None,
               end_us: int | None, budget_scale: float,
               curve: CurveSpec | None) -> list[dict[str, Any]]:
    """Worker: solve units one at a time (memory: one unit) from the parent's catalog
    (pickled with its snapshot of the files, so every worker reads the same rows)."""
    return [_solve_unit(catalog, u, start_us, end_us, budget_scale, curve) for u in units]


def _frame(rows: list[dict[str, Any]], curve: bool) -> pl.DataFrame:
    schema: dict[str, Any] = {
        "campaign_id": pl.String, "members": pl.List(pl.String), "budget": pl.Float64,
        "lambda": pl.Float64, "results": pl.Float64, "spend": pl.Float64, "wins": pl.Int64,
        "cost_per_result": pl.Float64, "upper_bound": pl.Float64, "binding": pl.String,
        "mu": pl.Float64, "gap": pl.Float64, "surplus": pl.Float64, "rows": pl.Int64,
        "error": pl.String,
        "placements": pl.List(pl.Struct({"placement": pl.String, "results": pl.Float64,
                                         "spend": pl.Float64, "wins": pl.Int64,
                                         "marginal_cost_per_result": pl.Float64})),
        "member_breakdown": pl.List(pl.Struct({"campaign_id": pl.String,
                                               "results": pl.Float64, "spend": pl.Float64,
                                               "wins": pl.Int64})),
    }
    if curve:
        schema["curve"] = pl.List(pl.Struct({"budget_scale": pl.Float64, "budget": pl.Float64,
                                             "results": pl.Float64,
                                             "upper_bound": pl.Float64,
                                             "lambda": pl.Float64}))
    data = {k: [r.get(k) for r in rows] for k in schema}
    return pl.DataFrame(data, schema=schema)


def hindsight(source: Any, campaign_ids: Sequence[str] | None = None, start: Any = None,
              end: Any = None, budget_scale: float = 1.0,
              curve: CurveSpec | str | None = None, workers: int | None = None,
              progress: bool = False, *, budget: float | None = None,
              max_cost_per_result: float | None = None) -> pl.DataFrame:
    """Hindsight optimum per campaign (or group) as a polars DataFrame.

    ``source``: a Catalog, a catalog path, or CampaignArrays (then ``budget`` in currency
    and optionally ``max_cost_per_result`` are required/used). ``start``/``end``: window
    (datetime, date, ISO string or int microseconds UTC). ``curve``: ``CurveSpec`` or
    ``"LO:HI:N"`` budget multipliers. ``workers``: processes (default: CPU count; 1 runs
    in this process). Rows whose ``error`` is set failed; the others still ran.
    """
    from replay.catalog import to_us

    if isinstance(curve, str):
        curve = CurveSpec.parse(curve)
    start_us, end_us = to_us(start), to_us(end)
    if isinstance(source, CampaignArrays):
        spec = CampaignSpec(source.campaign_id, budget,  # type: ignore[arg-type]
                            max_cost_per_result=max_cost_per_result)
        row = solve_campaign_arrays(source, spec, budget_scale=budget_scale, curve=curve,
                                    start_us=start_us, end_us=end_us)
        return _frame([row], curve is not None)

    from replay.catalog import Catalog

    catalog = source if isinstance(source, Catalog) else Catalog(Path(source))
    units = _plan_units(catalog, campaign_ids)
    n_workers = (os.cpu_count() or 1) if workers is None else max(1, int(workers))
    n_workers = min(n_workers, max(1, len(units)))
    results: dict[str, dict[str, Any]] = {}

    bar = None
    if progress and units:
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeElapsedColumn

        bar = Progress("[progress.description]{task.description}", BarColumn(),
                       MofNCompleteColumn(), TimeElapsedColumn(), transient=True)
        bar.start()
        task = bar.add_task("hindsight", total=len(units))
    try:
        if n_workers == 1:
            for u in units:
                results[u.unit_id] = _solve_unit(catalog, u, start_us, end_us, budget_scale,
                                                 curve)
                if bar is not None:
                    bar.advance(task)
        else:
            # Small chunks keep the pool busy; each worker loads one unit at a time.
            size = max(1, len(units) // (n_workers * 4))
            chunks = [units[i:i + size] for i in range(0, len(units), size)]
            # spawn: a forked child would inherit DuckDB's and numba's threads mid-state.
            with ProcessPoolExecutor(max_workers=n_workers,
                                     mp_context=get_context("spawn")) as pool:
                futures = {pool.submit(_run_chunk, catalog, ch, start_us, end_us,
                                       budget_scale, curve): ch for ch in chunks}
                for fut in as_completed(futures):
                    for u, r in zip(futures[fut], fut.result(), strict=True):
                        results[u.unit_id] = r
                    if bar is not None:
                        bar.advance(task, len(futures[fut]))
    finally:
        if bar is not None:
            bar.stop()
    return _frame([results[u.unit_id] for u in units], curve is not None)
