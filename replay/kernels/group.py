"""Hindsight optimum of a campaign group: one shared budget, at most one winner per request.

Campaigns of a group pool their rows under one budget. Where several campaigns of the group
could serve the same request, only one of them may win it: the LP is the relaxation of a
multiple-choice knapsack (each request a class, each campaign row an option). Its exact
solution (Sinha and Zoltners 1979): per request, drop the options that are LP-dominated and
keep the upper convex hull of (cost, value) from the origin; the hull's segments are
incremental items with decreasing efficiency (extra value per extra cost); a fractional
knapsack over all incremental items (``kernels.hindsight.solve``) then takes each request's
segments in order, so the result maps back to one option per request. The integral
solution takes, per request, the option at the last hull vertex fully reached.

The dual is ``lambda B + sum_requests max(0, max_j (v_j - lambda c_j))``, which equals the
items' ``lambda B + sum (dv - lambda dc)^+`` because hull vertices maximize every linear
function; so ``surplus``, ``dual_value`` and ``gap`` keep their meaning from the single
campaign case. Caps are not modelled for groups (the campaign table gives caps per campaign,
not per group).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from replay.kernels.hindsight import HindsightSolution, solve


@dataclass(frozen=True)
class GroupSolution:
    """Group optimum and its breakdowns (currency, results)."""

    solution: HindsightSolution  # totals; ``taken`` is the per-row mask of chosen options
    member_results: np.ndarray  # float64[M]: results of the integral solution per member
    member_spend: np.ndarray  # float64[M]: currency per member
    member_wins: np.ndarray  # int64[M]
    placement_results: np.ndarray  # float64[P]
    placement_spend: np.ndarray  # float64[P]
    placement_wins: np.ndarray  # int64[P]
    # Equal-marginal diagnostic: per placement, the cost per result of the least efficient
    # increment taken there (currency per result; nan when nothing priced was taken). At
    # the optimum these are all <= 1 / lambda and close to it where the placement is deep.
    placement_marginal_cost_per_result: np.ndarray  # float64[P]
    marginal_cost_per_result: float  # 1 / lambda (inf when the budget does not bind)
    items: int  # number of incremental hull items the knapsack ran on
    item_value: np.ndarray  # float64: extra results of each hull item (for budget curves)
    item_cost: np.ndarray  # float64: extra cost of each hull item (currency)
    contested_requests: int  # requests with options from two or more rows


@njit(cache=True, nogil=True)
def _hulls(order, req, value, price):
    """Incremental hull items of every request (rows given in request, cost, -value order).

    Returns item value, item cost and the row index of the item's hull vertex.
    """
    n = order.shape[0]
    dv = np.empty(n)
    dc = np.empty(n)
    vrow = np.empty(n, np.int64)
    hv = np.empty(n + 1)
    hc = np.empty(n + 1)
    hr = np.empty(n + 1, np.int64)
    n_items = 0
    i = 0
    while i < n:
        j = i
        r = req[order[i]]
        while j < n and req[order[j]] == r:
            j += 1
        # Hull from the origin over rows order[i:j], cost ascending, value descending.
        h = 1
        hv[0] = 0.0
        hc[0] = 0.0
        hr[0] = -1
        for k in range(i, j):
            row = order[k]
            c = price[row]
            v = value[row]
            if v <= hv[h - 1]:
                continue  # dominated: costs at least as much, gives no more
            if c == hc[h - 1]:
                # Same cost and more value (only the origin at cost 0): replace it.
                hv[h - 1] = v
                hr[h - 1] = row
                continue
            # Pop vertices that are not above the chord to the new point.
            while h >= 2 and (hv[h - 1] - hv[h - 2]) * (c - hc[h - 1]) <= \
                    (v - hv[h - 1]) * (hc[h - 1] - hc[h - 2]):
                h -= 1
            hv[h] = v
            hc[h] = c
            hr[h] = row
            h += 1
        for k in range(h):
            if hr[k] < 0:
                continue
            pv = hv[k - 1] if k > 0 else 0.0
            pc = hc[k - 1] if k > 0 else 0.0
            dv[n_items] = hv[k] - pv
            dc[n_items] = hc[k] - pc
            vrow[n_items] = hr[k]
            n_items += 1
        i = j
    return dv[:n_items], dc[:n_items], vrow[:n_items]


def request_codes(request_id: np.ndarray | None, n: int) -> np.ndarray:
    """Int64 code per row: equal request ids share a code; a missing id gets its own."""
    if request_id is None:
        return np.arange(n, dtype=np.int64)
    ids = np.asarray(request_id, dtype=object)
    missing = np.array([x is None for x in ids], dtype=bool)
    codes = np.empty(n, dtype=np.int64)
    if (~missing).any():
        _, inv = np.unique(ids[~missing].astype(str), return_inverse=True)
        codes[~missing] = inv
        start = int(inv.max()) + 1 if inv.size else 0
    else:
        start = 0
    codes[missing] = start + np.arange(int(missing.sum()))
    return codes


def solve_group(value: np.ndarray, min_win_price: np.ndarray, request_code: np.ndarray,
                budget: float, *, member: np.ndarray | None = None, n_members: int = 1,
                placement_code: np.ndarray | None = None,
                n_placements: int = 1) -> GroupSolution:
    """Exact LP optimum of pooled rows under one ``budget`` (currency), one win per request.

    ``request_code``: int per row (rows with equal codes compete for one impression);
    ``member``: int in [0, n_members) naming each row's campaign; ``placement_code``: int in
    [0, n_placements). Returns totals (``solution.taken`` marks the chosen rows) and
    breakdowns per member and per placement.
    """
    v = np.ascontiguousarray(value, dtype=np.float64)
    p = np.ascontiguousarray(min_win_price, dtype=np.float64)
    req = np.ascontiguousarray(request_code, dtype=np.int64)
    n = v.shape[0]
    if p.shape != v.shape or req.shape != v.shape:
        raise ValueError("value, min_win_price and request_code must have one length")
    if n and (not np.isfinite(v).all() or not np.isfinite(p).all() or (v < 0).any()
              or (p < 0).any()):
        raise ValueError("value and min_win_price must be finite and >= 0")
    member = np.zeros(n, np.int64) if member is None else np.asarray(member, np.int64)
    placement = (np.zeros(n, np.int64) if placement_code is None
                 else np.asarray(placement_code, np.int64))

    order = np.lexsort((-v, p, req))
    dv, dc, vrow = _hulls(order, req, v, p)
    sol = solve(dv, dc, budget, return_mask=True)
    taken_items = sol.taken
    # Items of one request are taken as a prefix: the last taken one names the chosen row.
    chosen = np.zeros(n, dtype=bool)
    if taken_items is not None and taken_items.any():
        rows = vrow[taken_items]
        reqs = req[rows]
        # Within a request the hull items come in increasing cost; keep the last per request.
        last = np.ones(rows.shape[0], dtype=bool)
        last[:-1] = reqs[1:] != reqs[:-1]
        chosen[rows[last]] = True

    results = float(v[chosen].sum())
    spend = float(p[chosen].sum())
    wins = int(chosen.sum())
    solution = HindsightSolution(
        upper_bound=sol.upper_bound, results=results, spend=spend, wins=wins,
        cost_per_result=spend / results if results > 0 else math.nan,
        lambda_=sol.lambda_, mu=0.0, binding=sol.binding, surplus=sol.surplus,
        dual_value=sol.dual_value, gap=sol.dual_value - sol.upper_bound, taken=chosen,
        spend_upper_bound=sol.spend_upper_bound, marginal_ratio=sol.marginal_ratio,
    )
    m_res = np.bincount(member[chosen], weights=v[chosen], minlength=n_members)
    m_sp = np.bincount(member[chosen], weights=p[chosen], minlength=n_members)
    m_w = np.bincount(member[chosen], minlength=n_members).astype(np.int64)
    p_res = np.bincount(placement[chosen], weights=v[chosen], minlength=n_placements)
    p_sp = np.bincount(placement[chosen], weights=p[chosen], minlength=n_placements)
    p_w = np.bincount(placement[chosen], minlength=n_placements).astype(np.int64)

    # Marginal cost per result per placement: the least efficient taken increment there.
    marg = np.full(n_placements, np.nan)
    if taken_items is not None:
        sel = taken_items & (dc > 0)
        if sel.any():
            cpr = dc[sel] / dv[sel]
            pl = placement[vrow[sel]]
            np.fmax.at(marg, pl, cpr)
    contested = int(np.count_nonzero(np.bincount(req)[np.unique(req)] > 1)) if n else 0
    return GroupSolution(
        solution=solution, member_results=m_res, member_spend=m_sp, member_wins=m_w,
        placement_results=p_res, placement_spend=p_sp, placement_wins=p_w,
        placement_marginal_cost_per_result=marg,
        marginal_cost_per_result=(1.0 / sol.lambda_) if sol.lambda_ > 0 else math.inf,
        items=int(dv.shape[0]), item_value=dv, item_cost=dc,
        contested_requests=contested,
    )
