"""Regret split: the parts add up to upper_bound - results; each is >= 0 when feasible."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from replay.analysis.regret import decompose_regret
from replay.kernels.hindsight import solve


def _brute_replay(v, p, first, budget, multiplier, shade):
    """Bid value * multiplier (first price: shaded by ``shade``), one row at a time.

    Common practice (the replay rule of design.md section 2): win iff bid >= min_win_price;
    second price pays min_win_price, first price pays the bid; a win the remaining budget
    cannot pay is skipped.
    """
    spend = results = c_won = 0.0
    for i in range(v.size):
        bid = v[i] * multiplier * (shade if first[i] else 1.0)
        if bid < p[i]:
            continue
        charge = bid if first[i] else p[i]
        if spend + charge > budget:
            continue
        spend += charge
        results += v[i]
        c_won += p[i]
    return spend, results, c_won


@pytest.mark.parametrize("seed", range(6))
def test_parts_add_up_on_first_and_second_price_rows(seed):
    rng = np.random.default_rng(seed)
    n = 3000
    v = rng.exponential(0.02, n)
    p = rng.lognormal(-6.0, 1.0, n)
    first = rng.random(n) < 0.5
    budget = rng.uniform(0.05, 0.6) * p.sum()
    sol = solve(v, p, budget)
    mult = float(rng.uniform(0.05, 2.0) / max(sol.lambda_, 1e-9))
    spend, results, c_won = _brute_replay(v, p, first, budget, mult, rng.uniform(0.6, 1.0))
    d = decompose_regret(budget=budget, lambda_star=sol.lambda_, surplus=sol.surplus,
                         upper_bound=sol.upper_bound, results=results, spend=spend,
                         min_price_cost=c_won)
    # Source: LP strong duality (dual value = upper bound), as written in DEVELOPERS.md.
    parts = d["unspent"] + d["overpayment"] + d["misallocation"]
    assert abs(parts - (sol.upper_bound - results)) <= 1e-9 * sol.upper_bound
    assert abs(d["regret"] - (sol.upper_bound - results)) <= 1e-12 * sol.upper_bound
    assert d["relative_regret"] == pytest.approx(d["regret"] / sol.upper_bound)
    # A feasible allocation (spend <= B, charges >= min price) has every part >= 0.
    assert d["unspent"] >= 0 and d["overpayment"] >= 0 and d["misallocation"] >= -1e-12
    assert d["regret"] >= -1e-12


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10_000), st.floats(0.0, 1.0), st.integers(1, 200))
def test_regret_nonnegative_for_any_feasible_allocation(seed, share, n):
    # Any 0/1 allocation within budget, paid at least the minimum winning price.
    rng = np.random.default_rng(seed)
    v = rng.exponential(1.0, n)
    p = rng.lognormal(0.0, 1.0, n)
    budget = share * p.sum()
    sol = solve(v, p, budget)
    order = rng.permutation(n)
    won = np.zeros(n, dtype=bool)
    spend = 0.0
    markup = rng.uniform(1.0, 1.5, n)  # overpayment above the minimum price
    for i in order:
        if rng.random() < 0.5 and spend + p[i] * markup[i] <= budget:
            won[i] = True
            spend += p[i] * markup[i]
    d = decompose_regret(budget=budget, lambda_star=sol.lambda_, surplus=sol.surplus,
                         upper_bound=sol.upper_bound, results=float(v[won].sum()),
                         spend=spend, min_price_cost=float(p[won].sum()))
    scale = max(1.0, sol.upper_bound)
    assert d["regret"] >= -1e-9 * scale
    for key in ("unspent", "overpayment", "misallocation"):
        assert d[key] >= -1e-9 * scale
    total = d["unspent"] + d["overpayment"] + d["misallocation"]
    assert abs(total - d["regret"]) <= 1e-9 * scale


def test_budget_not_binding_is_all_misallocation():
    v = np.array([1.0, 2.0])
    p = np.array([1.0, 1.0])
    sol = solve(v, p, 10.0)
    d = decompose_regret(budget=10.0, lambda_star=sol.lambda_, surplus=sol.surplus,
                         upper_bound=sol.upper_bound, results=1.0, spend=1.0,
                         min_price_cost=1.0)
    assert d["unspent"] == 0 and d["overpayment"] == 0
    assert d["misallocation"] == d["regret"] == 2.0
    z = decompose_regret(budget=1.0, lambda_star=0.0, surplus=0.0, upper_bound=0.0,
                         results=0.0, spend=0.0, min_price_cost=0.0)
    assert math.isnan(z["relative_regret"]) and z["regret"] == 0.0


@pytest.mark.parametrize("seed", range(5))
def test_parts_add_up_when_a_cost_per_result_cap_binds(seed):
    # Source: scipy.optimize.linprog (HiGHS) for the LP optimum and its dual multipliers;
    # the four parts must add up to optimum - results (strong duality, module docstring).
    from scipy.optimize import linprog

    rng = np.random.default_rng(100 + seed)
    n = 400
    v = rng.exponential(1.0, n)
    p = rng.lognormal(0.0, 1.0, n)
    budget = 10.0 * p.sum()  # never binds
    cap = 0.3 * float(np.median(p / v))  # cheap rows only: binds
    sol = solve(v, p, budget, cap)
    assert sol.binding == "cap" and sol.mu > 0 and sol.lambda_ == 0
    res = linprog(-v, A_ub=np.vstack([p, p - cap * v]), b_ub=[budget, 0.0], bounds=(0, 1),
                  method="highs")
    assert res.status == 0
    assert sol.upper_bound == pytest.approx(-res.fun, rel=1e-9)
    assert sol.mu == pytest.approx(-res.ineqlin.marginals[1], rel=1e-6)

    # An allocation that keeps the cap: rows in random order, each taken (at a markup
    # above the minimum price) only if the spend stays under cap x results.
    for trial in range(20):
        markup = rng.uniform(1.0, 1.3, n)
        won = np.zeros(n, bool)
        spend = results = 0.0
        for i in rng.permutation(n):
            if rng.random() < 0.5 and spend + p[i] * markup[i] <= cap * (results + v[i]):
                won[i] = True
                spend += p[i] * markup[i]
                results += v[i]
        d = decompose_regret(budget=budget, lambda_star=sol.lambda_, surplus=sol.surplus,
                             upper_bound=sol.upper_bound, results=results, spend=spend,
                             min_price_cost=float(p[won].sum()), mu_star=sol.mu, cap=cap,
                             dual_value=sol.dual_value)
        scale = max(1.0, sol.upper_bound)
        total = d["unspent"] + d["overpayment"] + d["cap_slack"] + d["misallocation"]
        assert abs(total - (-res.fun - results)) <= 1e-9 * scale, trial
        for key in ("unspent", "overpayment", "cap_slack", "misallocation"):
            assert d[key] >= -1e-9 * scale, (trial, key, d[key])
    # without the cap arguments a binding cap cannot be split
    with pytest.raises(ValueError, match="needs cap and dual_value"):
        decompose_regret(budget=budget, lambda_star=0.0, surplus=0.0, upper_bound=1.0,
                         results=0.0, spend=0.0, min_price_cost=0.0, mu_star=sol.mu)
