"""Per-campaign metrics of a replay against the hindsight optimum of the same rows and budget.

Everything here is a pure function of a ``CampaignReplay`` (engine output), the replayed
``CampaignArrays`` and the ``HindsightSolution`` (with its ``taken`` mask). Units: currency
for spend and pacing errors, results for regret, results per currency for lambda.

Marginal cost per result per placement (a diagnostic; at the optimum it is the same on
every placement, ``1 / lambda*``). Among a placement's won rows, ordered by cost per
result ``c / v`` (most expensive first), the *marginal slice* is the most expensive rows
that make up ``MARGINAL_SHARE`` (10 %) of the placement's won cost, at least one row;
the metric is the slice's cost over its results. A slice rather than the single last row
keeps it stable against one odd row. The replay's cost is what it paid: the minimum winning
price times the placement's ratio of paid prices to minimum prices (1 on second price; the
overpayment factor of shading on first price). The optimum pays the minimum price.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import polars as pl

MARGINAL_SHARE = 0.10
#: Relative tolerance of the cost-per-result cap check (float rounding of sums).
CAP_TOLERANCE = 1e-9
LAMBDA_FLOOR = 1e-12


def pacing_error(cum_spend: np.ndarray, cum_target: np.ndarray) -> tuple[float | None,
                                                                          float | None]:
    """Largest and mean ``|cum_spend - cum_target|`` over the updates (currency).

    None when there is no update.
    """
    a = np.asarray(cum_spend, np.float64)
    b = np.asarray(cum_target, np.float64)
    if a.shape[0] == 0:
        return None, None
    gap = np.abs(a - b)
    return float(gap.max()), float(gap.mean())


def lambda_volatility(lam: np.ndarray) -> float | None:
    """Standard deviation (ddof=0) of the changes of ``log(lambda)`` between updates.

    ``lambda`` is floored at 1e-12 as in the engine; None with fewer than two changes.
    """
    x = np.asarray(lam, np.float64)
    x = x[np.isfinite(x)]
    if x.shape[0] < 3:
        return None
    d = np.diff(np.log(np.maximum(x, LAMBDA_FLOOR)))
    return float(d.std())


def cap_violated(spend: float, results: float, cap: float | None) -> bool:
    """True when a cost-per-result cap exists and ``spend > cap * results`` (beyond rounding).

    Spending anything with zero results violates a cap."""
    if cap is None:
        return False
    return bool(spend > cap * results * (1.0 + CAP_TOLERANCE) + 1e-12)


def marginal_cost_per_result(cost: np.ndarray, value: np.ndarray, codes: np.ndarray,
                             mask: np.ndarray, n_placements: int,
                             share: float = MARGINAL_SHARE) -> np.ndarray:
    """Per placement: cost over results of the most expensive ``share`` of won cost.

    ``cost`` and ``value`` per row (currency, results); ``mask`` selects the won rows;
    NaN for a placement without won rows or whose slice has no results.
    """
    out = np.full(n_placements, np.nan)
    m = np.asarray(mask, np.bool_)
    if not m.any():
        return out
    c = np.asarray(cost, np.float64)[m]
    v = np.asarray(value, np.float64)[m]
    p = np.asarray(codes, np.int64)[m]
    with np.errstate(divide="ignore", invalid="ignore"):
        cpr = np.where(v > 0, c / v, np.where(c > 0, np.inf, 0.0))
    # Group rows by placement (one stable integer sort), then sort each placement's rows by
    # cost per result, most expensive first (ties keep row order: deterministic).
    by_p = np.argsort(p, kind="stable")
    bounds = np.searchsorted(p[by_p], np.arange(n_placements + 1), "left")
    for k in range(n_placements):
        lo, hi = bounds[k], bounds[k + 1]
        if hi <= lo:
            continue
        idx = by_p[lo:hi]
        total = float(c[idx].sum())
        r = cpr[idx]
        m_rows = idx.shape[0]
        if m_rows > 4096:
            # Only the most expensive rows matter: a linear-time partition keeps a candidate
            # set (top 30 % by cost per result); sort it alone when it holds enough cost.
            kth = int(m_rows * 0.7)
            cut = np.partition(r, kth)[kth]
            cand = idx[r >= cut]
            if float(c[cand].sum()) >= share * total:
                idx = cand
        idx = idx[np.argsort(-cpr[idx], kind="stable")]
        cc = np.cumsum(c[idx])
        # Smallest prefix (at least one row) reaching `share` of the placement's cost.
        stop = 1 if total <= 0 else int(np.searchsorted(cc, share * total, "left")) + 1
        stop = min(max(stop, 1), hi - lo)
        vs = float(v[idx[:stop]].sum())
        cs = float(cc[stop - 1])
        out[k] = cs / vs if vs > 0 else np.nan
    return out


def placement_table(arrays: Any, won: np.ndarray, replay_placements: pl.DataFrame,
                    opt_taken: np.ndarray | None,
                    placements: tuple[tuple[str, str], ...] | list[tuple[str, str]],
                    opt_cache: dict | None = None) -> pl.DataFrame:
    """Per placement: the replay's totals beside the optimum's results and spend, and both
    marginal costs per result. One row per placement with logged rows in the window.

    ``opt_cache``: a dict kept by the caller across settings of one campaign, so the
    optimum's per-placement figures are computed once."""
    n_p = len(placements)
    codes = np.asarray(arrays.placement_code, np.int64)
    price = np.asarray(arrays.min_win_price, np.float64)
    value = np.asarray(arrays.value, np.float64)
    won = np.asarray(won, np.bool_)
    rep = replay_placements
    by_name = {row["placement"]: row for row in rep.iter_rows(named=True)}
    c_won = np.bincount(codes, weights=np.where(won, price, 0.0), minlength=n_p)[:n_p]
    # Paid / minimum price per placement: how much the replay paid above the hindsight cost.
    factor = np.ones(n_p)
    for k, (name, _) in enumerate(placements):
        row = by_name.get(name)
        if row is not None and c_won[k] > 0:
            paid = row.get("expected_spend", row.get("spend"))
            factor[k] = float(paid) / float(c_won[k])
    rep_marg = marginal_cost_per_result(price * factor[codes] if codes.size else price,
                                        value, codes, won, n_p)
    if opt_cache is not None and "opt" in opt_cache:
        opt_res, opt_sp, opt_marg = opt_cache["opt"]
    elif opt_taken is not None:
        taken = np.asarray(opt_taken, np.bool_)
        opt_res = np.bincount(codes, weights=np.where(taken, value, 0.0), minlength=n_p)[:n_p]
        opt_sp = np.bincount(codes, weights=np.where(taken, price, 0.0), minlength=n_p)[:n_p]
        opt_marg = marginal_cost_per_result(price, value, codes, taken, n_p)
    else:
        opt_res = opt_sp = opt_marg = np.full(n_p, np.nan)
    if opt_cache is not None:
        opt_cache["opt"] = (opt_res, opt_sp, opt_marg)
    rows = []
    for k, (name, pricing) in enumerate(placements):
        row = by_name.get(name)
        if row is None:
            continue
        rows.append({
            "placement": name, "pricing": row.get("pricing", pricing),
            "auctions": int(row["auctions"]), "wins": int(row["wins"]),
            "results": float(row["results"]), "spend": float(row["spend"]),
            "opt_results": _f(opt_res[k]), "opt_spend": _f(opt_sp[k]),
            "marginal_cost_per_result": _f(rep_marg[k]),
            "opt_marginal_cost_per_result": _f(opt_marg[k]),
        })
    return pl.DataFrame(rows, schema={
        "placement": pl.String, "pricing": pl.String, "auctions": pl.Int64, "wins": pl.Int64,
        "results": pl.Float64, "spend": pl.Float64, "opt_results": pl.Float64,
        "opt_spend": pl.Float64, "marginal_cost_per_result": pl.Float64,
        "opt_marginal_cost_per_result": pl.Float64})


def _f(x: float) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def campaign_totals(replay: Any, opt: Any, *, budget: float, cap: float | None) -> dict:
    """The totals row of one campaign (columns of ``totals.parquet`` except ``setting_id``
    and ``exhausted_at``, which the engine adds as a timestamp).

    Regret against the LP upper bound, its four-part split (``decompose_regret``), budget
    used, cap violation, pacing error and lambda volatility.
    """
    from replay.analysis.regret import decompose_regret

    t = replay.totals
    results = float(t["results"])
    spend = float(t["spend"])
    min_cost = float(t["min_price_cost"])
    parts = decompose_regret(budget=float(budget), lambda_star=float(opt.lambda_),
                             surplus=float(opt.surplus), upper_bound=float(opt.upper_bound),
                             results=results, spend=spend, min_price_cost=min_cost,
                             mu_star=float(opt.mu), cap=cap, dual_value=float(opt.dual_value))
    ser = replay.series
    if ser.height:
        pe_max, pe_mean = pacing_error(ser["cum_spend"].to_numpy(), ser["cum_target"].to_numpy())
        vol = lambda_volatility(ser["lambda"].to_numpy())
    else:
        pe_max = pe_mean = vol = None
    ub = float(opt.upper_bound)
    regret = float(parts["regret"])
    return {
        "campaign_id": str(replay.campaign_id), "budget": float(budget),
        "auctions": int(t["auctions"]), "wins": int(t["wins"]), "results": results,
        "spend": spend, "cost_per_result": _f(spend / results) if results > 0 else None,
        "budget_used": spend / float(budget) if budget > 0 else None,
        "exhausted_at_us": t.get("exhausted_at_us"),
        "max_cost_per_result": cap, "cap_violated": cap_violated(spend, results, cap),
        "min_price_cost": min_cost, "opt_upper_bound": ub,
        "opt_results": float(opt.results), "opt_spend": float(opt.spend),
        "opt_lambda": float(opt.lambda_), "regret": regret,
        "relative_regret": _f(parts.get("relative_regret", regret / ub if ub > 0 else math.nan))
        if ub > 0 else None,
        "regret_unspent": float(parts["unspent"]),
        "regret_overpayment": float(parts["overpayment"]),
        "regret_misallocation": float(parts["misallocation"]),
        "regret_cap_slack": float(parts["cap_slack"]),
        "pacing_error_max": pe_max, "pacing_error_mean": pe_mean,
        "lambda_final": _f(t.get("lambda_final", math.nan)), "lambda_volatility": vol,
        "bids_above_logged": _f(t.get("bids_above_logged", math.nan)),
    }
