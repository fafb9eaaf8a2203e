"""Hindsight LP kernel: checked against HiGHS, LP duality and greedy optimality."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import linprog

from replay.kernels.hindsight import budget_curve, solve

REL = 1e-9


def _instance(seed: int, n: int, ties: bool = False, zeros: bool = False):
    rng = np.random.default_rng(seed)
    v = rng.exponential(0.02, n)
    p = rng.lognormal(-6.0, 1.0, n)
    if ties:  # coarse grids give many equal ratios and equal prices
        v = np.round(v, 3)
        p = np.round(p, 4)
    if zeros:
        v[rng.random(n) < 0.05] = 0.0
        p[rng.random(n) < 0.05] = 0.0
    return v, p


def _highs(v, p, budget=None, cap=None):
    # Source: scipy.optimize.linprog with the HiGHS solver (general-purpose LP reference).
    rows, rhs = [], []
    if budget is not None:
        rows.append(p)
        rhs.append(budget)
    if cap is not None:
        rows.append(p - cap * v)  # spend <= cap * results
        rhs.append(0.0)
    res = linprog(-v, A_ub=np.array(rows), b_ub=np.array(rhs), bounds=(0, 1), method="highs")
    assert res.status == 0
    return -res.fun, -np.asarray(res.ineqlin.marginals)


def _close(a, b, rel=REL):
    return abs(a - b) <= rel * max(1.0, abs(a), abs(b))


@pytest.mark.parametrize("seed,ties,zeros", [(1, False, False), (2, True, False),
                                             (3, False, True), (4, True, True)])
@pytest.mark.parametrize("share", [0.05, 0.3, 0.9])
def test_budget_matches_highs(seed, ties, zeros, share):
    v, p = _instance(seed, 3000, ties, zeros)
    budget = share * float(p[v > 0].sum())
    sol = solve(v, p, budget)
    opt, duals = _highs(v, p, budget)
    assert _close(sol.upper_bound, opt)
    assert sol.binding == "budget"
    # The LP dual of the budget row is lambda (HiGHS marginals, sign flipped for a max).
    assert _close(sol.lambda_, duals[0], 1e-7)
    assert abs(sol.gap) <= REL * sol.upper_bound


@pytest.mark.parametrize("seed", [5, 6, 7])
@pytest.mark.parametrize("cap_factor,budget_share", [(0.6, 0.9), (1.5, 0.1), (3.0, 2.0)])
def test_budget_and_cap_match_highs(seed, cap_factor, budget_share):
    v, p = _instance(seed, 3000, ties=seed == 6, zeros=seed == 7)
    useful = v > 0
    cap = cap_factor * float(p[useful].sum() / v[useful].sum())
    budget = budget_share * float(p[useful].sum())
    sol = solve(v, p, budget, cap)
    opt, duals = _highs(v, p, budget, cap)
    assert _close(sol.upper_bound, opt)
    assert _close(sol.lambda_, duals[0], 1e-6)
    assert _close(sol.mu, duals[1], 1e-6)
    expected = "budget" if duals[0] > 0 else ("cap" if duals[1] > 0 else "none")
    assert sol.binding == expected
    assert abs(sol.gap) <= 1e-8 * max(1.0, sol.upper_bound)
    # The integral solution respects both constraints.
    assert sol.spend <= budget * (1 + 1e-12)
    assert sol.spend <= cap * sol.results * (1 + 1e-12)


@pytest.mark.parametrize("seed", [8, 9])
@pytest.mark.parametrize("cap_factor", [0.5, 0.9, 5.0])
def test_cap_alone_matches_highs(seed, cap_factor):
    v, p = _instance(seed, 3000, zeros=True)
    useful = v > 0
    cap = cap_factor * float(p[useful].sum() / v[useful].sum())
    sol = solve(v, p, None, cap)
    opt, duals = _highs(v, p, None, cap)
    assert _close(sol.upper_bound, opt)
    assert _close(sol.mu, duals[0], 1e-6)
    assert sol.lambda_ == 0.0
    assert sol.binding == ("cap" if duals[0] > 0 else "none")
    assert sol.spend <= cap * sol.results * (1 + 1e-12)
    assert solve(v, p, math.inf, cap).upper_bound == sol.upper_bound


def test_strong_and_weak_duality():
    # Source: LP duality theorem (e.g. Bertsimas and Tsitsiklis, Introduction to Linear
    # Optimization, ch. 4): the dual lambda B + sum (v - lambda c)^+ is >= the primal for
    # every lambda >= 0 and equal to it at the optimum. Computed here in plain numpy.
    v, p = _instance(11, 5000, ties=True)
    budget = 0.25 * p.sum()
    sol = solve(v, p, budget)

    def dual(lam):
        return lam * budget + np.maximum(v - lam * p, 0.0).sum()

    assert _close(dual(sol.lambda_), sol.upper_bound)
    for lam in sol.lambda_ * np.array([0.0, 0.5, 0.9, 0.999, 1.001, 1.1, 2.0, 10.0]):
        assert dual(lam) >= sol.upper_bound * (1 - 1e-12)


def test_dantzig_greedy_is_optimal_against_brute_force_lp_vertices():
    # Source: Dantzig (1957), the fractional knapsack greedy by value/weight is optimal; an
    # LP optimum lies at a vertex, which for one budget row has at most one fractional
    # variable. Enumerate every vertex of a small instance: each 0/1 set plus at most one
    # fractional row filling the budget.
    rng = np.random.default_rng(12)
    for _ in range(20):
        n = 8
        v = rng.uniform(0, 1, n)
        p = rng.uniform(0.01, 1, n)
        budget = float(rng.uniform(0, p.sum()))
        best = 0.0
        for mask in range(1 << n):
            sel = np.array([(mask >> i) & 1 for i in range(n)], dtype=bool)
            spend = p[sel].sum()
            if spend > budget:
                continue
            val = v[sel].sum()
            rest = ~sel
            extra = np.max(np.minimum(1.0, (budget - spend) / p[rest]) * v[rest]) \
                if rest.any() else 0.0
            best = max(best, val + extra)
        assert _close(solve(v, p, budget).upper_bound, best)


def test_degenerate_cases():
    empty = np.array([])
    s = solve(empty, empty, 10.0)
    assert (s.upper_bound, s.results, s.wins, s.binding, s.lambda_) == (0, 0, 0, "none", 0)
    assert math.isnan(s.cost_per_result)
    # One row that fits, one that does not (half of it fits fractionally).
    s = solve(np.array([2.0]), np.array([1.0]), 5.0)
    assert (s.results, s.upper_bound, s.binding, s.lambda_) == (2.0, 2.0, "none", 0.0)
    s = solve(np.array([2.0]), np.array([1.0]), 0.5)
    assert (s.results, s.wins, s.binding) == (0.0, 0, "budget")
    assert s.upper_bound == 1.0 and s.lambda_ == 2.0
    # Zero budget: only zero-price rows, which are always taken (also with zero value).
    v = np.array([1.0, 0.5, 0.0, 3.0])
    p = np.array([0.0, 0.0, 0.0, 1.0])
    s = solve(v, p, 0.0, return_mask=True)
    assert s.results == 1.5 and s.wins == 3 and s.spend == 0.0
    assert s.taken.tolist() == [True, True, True, False]
    assert s.lambda_ == 3.0 and s.upper_bound == 1.5
    # Budget above the cost of every row: take every row with value, lambda 0.
    v = np.array([1.0, 0.0, 2.0, 0.3])
    p = np.array([0.5, 0.7, 1.0, 0.2])
    s = solve(v, p, 100.0, return_mask=True)
    assert s.binding == "none" and s.lambda_ == 0.0
    assert s.taken.tolist() == [True, False, True, True]  # zero value, positive price: out
    assert s.results == s.upper_bound == pytest.approx(3.3)


def test_ties_taken_in_price_order():
    # Four rows of ratio 2: by the tie rule (cheaper first) the budget 2.5 takes the 1.0
    # and 1.5 rows whatever the row order.
    v = np.array([6.0, 2.0, 3.0, 4.0])
    p = np.array([3.0, 1.0, 1.5, 2.0])
    for perm in ([0, 1, 2, 3], [3, 2, 1, 0], [2, 0, 3, 1]):
        s = solve(v[perm], p[perm], 2.5)
        assert s.results == 5.0 and s.spend == 2.5 and s.wins == 2
        assert s.upper_bound == 5.0 and s.lambda_ == 2.0


@pytest.mark.parametrize("kind", ["plain", "ties", "identical", "sparse", "zeros"])
def test_selection_path_agrees_with_sorted_curve(kind):
    # The selection (large inputs take the sample-bracket path) against one full sort.
    n = 60_000
    v, p = _instance(21, n, ties=kind == "ties", zeros=kind == "zeros")
    if kind == "identical":
        v[:] = 0.01
        p[:] = 0.002
    if kind == "sparse":  # few candidates: most rows have no value
        v[np.random.default_rng(3).random(n) < 0.995] = 0.0
    total = p[v > 0].sum()
    for share in (0.0, 1e-6, 0.01, 0.37, 0.999, 1.5):
        budget = share * total
        if kind == "identical":  # keep off the exact multiples, where rounding decides
            budget += 0.3 * p[0]
        s = solve(v, p, budget, return_mask=True)
        c = budget_curve(v, p, np.array([budget]))
        assert _close(s.upper_bound, c["upper_bound"][0], 1e-11)
        assert _close(s.results, c["results"][0], 1e-11)
        assert s.wins == c["wins"][0]
        assert _close(s.lambda_, c["lambda"][0], 1e-15)
        assert _close(float(v[s.taken].sum()), s.results, 1e-11)
        assert s.spend <= budget * (1 + 1e-12) or s.spend == 0.0


def test_curve_matches_solve_with_cap():
    v, p = _instance(31, 4000, ties=True)
    cap = 1.2 * p.sum() / v.sum()
    budgets = p.sum() * np.geomspace(0.01, 2.0, 12)
    c = budget_curve(v, p, budgets, cap)
    for i, b in enumerate(budgets):
        s = solve(v, p, b, cap)
        assert _close(c["upper_bound"][i], s.upper_bound, 1e-11)
        assert _close(c["results"][i], s.results, 1e-11)
        assert c["binding"][i] == s.binding
        assert _close(c["lambda"][i], s.lambda_, 1e-12)
        assert _close(c["mu"][i], s.mu, 1e-9)


def test_bad_input_raises():
    with pytest.raises(ValueError, match="finite"):
        solve(np.array([1.0, np.nan]), np.array([1.0, 1.0]), 1.0)
    with pytest.raises(ValueError, match="finite"):
        solve(np.array([1.0]), np.array([-1.0]), 1.0)
    with pytest.raises(ValueError, match="budget"):
        solve(np.array([1.0]), np.array([1.0]), -1.0)
    with pytest.raises(ValueError, match="max_cost_per_result"):
        solve(np.array([1.0]), np.array([1.0]), 1.0, 0.0)
    with pytest.raises(ValueError, match="one length"):
        solve(np.array([1.0]), np.array([1.0, 2.0]), 1.0)


# ----------------------------------------------------------------- properties (hypothesis)

rows = st.lists(st.tuples(st.floats(0, 1, allow_subnormal=False),
                          st.floats(0, 1, allow_subnormal=False)), min_size=0, max_size=60)


def _arrays(data):
    a = np.array(data, dtype=float).reshape(-1, 2)
    return a[:, 0].copy(), a[:, 1].copy()


@settings(max_examples=40, deadline=None)
@given(rows, st.floats(0, 1), st.floats(0, 1))
def test_monotone_in_budget_and_feasible(data, f1, f2):
    # Common practice (LP sensitivity): a larger budget never lowers the optimum.
    v, p = _arrays(data)
    lo, hi = sorted((f1, f2))
    b_lo, b_hi = lo * p.sum(), hi * p.sum()
    s_lo, s_hi = solve(v, p, b_lo), solve(v, p, b_hi)
    assert s_hi.upper_bound >= s_lo.upper_bound - 1e-12
    assert s_hi.results >= s_lo.results - 1e-12
    assert s_lo.spend <= b_lo * (1 + 1e-12) + 1e-300
    # Integral within one row's value of the fractional optimum (one fractional row).
    vmax = float(v.max()) if v.size else 0.0
    assert s_lo.results <= s_lo.upper_bound + 1e-12
    assert s_lo.upper_bound - s_lo.results <= vmax + 1e-12


@settings(max_examples=40, deadline=None)
@given(rows, st.floats(0, 1), st.randoms(use_true_random=False))
def test_row_order_does_not_matter(data, f, rnd):
    v, p = _arrays(data)
    perm = list(range(v.size))
    rnd.shuffle(perm)
    b = f * p.sum()
    a, c = solve(v, p, b), solve(v[perm], p[perm], b)
    assert a.wins == c.wins and a.binding == c.binding and a.lambda_ == c.lambda_
    assert _close(a.results, c.results, 1e-12) and _close(a.upper_bound, c.upper_bound, 1e-12)


@settings(max_examples=40, deadline=None)
@given(rows, st.floats(0.01, 1), st.sampled_from([0.25, 0.5, 2.0, 8.0]),
       st.floats(0.1, 10.0))
def test_price_and_budget_scaling(data, f, exact_k, k):
    # Scaling every price and the budget by k leaves the allocation unchanged and divides
    # lambda by k (units: results per currency). Powers of two scale floats exactly.
    v, p = _arrays(data)
    b = f * p.sum()
    a, c = solve(v, p, b), solve(v, p * exact_k, b * exact_k)
    assert a.results == c.results and a.wins == c.wins
    assert _close(a.upper_bound, c.upper_bound, 1e-12)
    assert _close(a.lambda_, c.lambda_ * exact_k, 1e-12)
    # Any factor: the LP value is continuous, so it agrees up to rounding.
    d = solve(v, p * k, b * k)
    assert _close(a.upper_bound, d.upper_bound, 1e-9)
