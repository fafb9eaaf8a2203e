"""Shared-budget groups: the multiple-choice knapsack LP against HiGHS and LP duality."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import linprog
from scipy.sparse import csr_matrix, vstack

from replay.kernels.group import request_codes, solve_group
from replay.kernels.hindsight import solve


def _group_instance(seed: int, n_requests: int = 1500, members: int = 3, share: float = 0.7):
    """Rows of ``members`` campaigns; each request is seen by a random subset of them."""
    rng = np.random.default_rng(seed)
    req, mem, val, price, plc = [], [], [], [], []
    for r in range(n_requests):
        k = rng.integers(1, members + 1)
        who = rng.choice(members, size=k, replace=False)
        base = rng.lognormal(-6.0, 0.8)
        for m in who:
            req.append(r)
            mem.append(m)
            val.append(rng.exponential(0.02) * (1 + m))
            # Price depends on the campaign too (first price landscapes differ by bidder).
            price.append(base * rng.uniform(0.5, 2.0) if rng.random() > 0.03 else 0.0)
            plc.append(rng.integers(0, 4))
    req, mem, val, price, plc = map(np.asarray, (req, mem, val, price, plc))
    budget = share * 0.5 * price.sum()
    return req, mem, val, price, plc, budget


def _highs_group(req, val, price, budget):
    # Source: scipy.optimize.linprog with HiGHS, on the LP relaxation of the multiple-choice
    # knapsack: max sum v x, sum c x <= B, sum_{rows of a request} x <= 1, 0 <= x <= 1.
    n = val.size
    uniq = np.unique(req)
    one_per_request = csr_matrix((np.ones(n), (np.searchsorted(uniq, req), np.arange(n))),
                                 shape=(uniq.size, n))
    a = vstack([csr_matrix(price.reshape(1, -1)), one_per_request]).tocsr()
    b = np.concatenate([[budget], np.ones(uniq.size)])
    res = linprog(-val, A_ub=a, b_ub=b, bounds=(0, 1), method="highs")
    assert res.status == 0
    return -res.fun, -res.ineqlin.marginals[0]


@pytest.mark.parametrize("seed,share", [(1, 0.05), (2, 0.4), (3, 0.9), (4, 5.0)])
def test_group_matches_highs(seed, share):
    req, mem, val, price, plc, budget = _group_instance(seed, share=share)
    g = solve_group(val, price, req, budget, member=mem, n_members=3, placement_code=plc,
                    n_placements=4)
    opt, lam = _highs_group(req, val, price, budget)
    sol = g.solution
    assert abs(sol.upper_bound - opt) <= 1e-9 * max(1.0, opt)
    assert abs(sol.lambda_ - lam) <= 1e-6 * max(1.0, lam)
    assert g.contested_requests > 0


def test_group_dual_certificate_and_integral_solution():
    # Source: LP duality for the multiple-choice knapsack (Sinha and Zoltners 1979): dual
    # lambda B + sum_requests max(0, max_j (v_j - lambda c_j)); equals the primal at lambda*.
    req, mem, val, price, plc, budget = _group_instance(7)
    g = solve_group(val, price, req, budget, member=mem, n_members=3, placement_code=plc,
                    n_placements=4)
    sol = g.solution
    lam = sol.lambda_
    best = np.zeros(req.max() + 1)
    np.maximum.at(best, req, val - lam * price)
    dual = lam * budget + best.sum()
    assert abs(dual - sol.upper_bound) <= 1e-9 * sol.upper_bound
    # Integral: one winner per request at most, within budget, within one row of the LP.
    chosen = sol.taken
    assert np.bincount(req[chosen]).max() <= 1
    assert price[chosen].sum() <= budget * (1 + 1e-12)
    assert sol.upper_bound - sol.results <= val.max()
    # Breakdowns add up to the totals.
    assert np.isclose(g.member_results.sum(), sol.results, rtol=1e-12)
    assert np.isclose(g.placement_spend.sum(), sol.spend, rtol=1e-12)
    assert g.member_wins.sum() == g.placement_wins.sum() == sol.wins
    # Equal-marginal diagnostic: no placement buys above the marginal cost per result.
    marg = g.placement_marginal_cost_per_result
    assert np.all(marg[~np.isnan(marg)] <= g.marginal_cost_per_result * (1 + 1e-12))


def test_group_without_shared_requests_is_the_pooled_campaign():
    rng = np.random.default_rng(9)
    n = 4000
    val = rng.exponential(0.02, n)
    price = rng.lognormal(-6, 1, n)
    budget = 0.3 * price.sum()
    g = solve_group(val, price, request_codes(None, n), budget)
    s = solve(val, price, budget)
    assert abs(g.solution.upper_bound - s.upper_bound) <= 1e-12 * s.upper_bound
    assert g.solution.wins == s.wins and g.contested_requests == 0


def test_hull_drops_dominated_options():
    # One request, three options: (cost 1, value 1), (cost 2, value 1.5), (cost 3, value 1.6)
    # and a dominated (cost 2.5, value 1.0). Hull from the origin by hand: slopes 1, 0.5,
    # 0.1. Budget 1.5 takes the first segment and half of the second: 1.25.
    val = np.array([1.0, 1.5, 1.6, 1.0])
    price = np.array([1.0, 2.0, 3.0, 2.5])
    g = solve_group(val, price, np.zeros(4, np.int64), 1.5)
    assert g.items == 3
    assert abs(g.solution.upper_bound - 1.25) < 1e-12
    assert g.solution.taken.tolist() == [True, False, False, False]
    assert g.solution.lambda_ == 0.5
    g = solve_group(val, price, np.zeros(4, np.int64), 10.0)
    assert g.solution.taken.tolist() == [False, False, True, False]
    assert g.solution.binding == "none"


def test_request_codes():
    ids = np.array(["a", None, "b", "a", None], dtype=object)
    c = request_codes(ids, 5)
    assert c[0] == c[3] and len({c[0], c[1], c[2], c[4]}) == 4
