"""The follow-the-leader index against a full sort of the same rows.

Reference (outside the index): the fractional-knapsack greedy (Dantzig 1957; CLRS ch. 16):
sort rows by value / price descending (numpy argsort), cumulative cost, and the marginal
row is the first whose cumulative cost exceeds the target; lambda is its ratio.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numba import njit

from replay.kernels.ftl_index import (
    ftl_capacity,
    ftl_count,
    ftl_index_new,
    ftl_insert,
    ftl_lambda_for_spend,
    ftl_total_spend,
)


def brute_lambda(value: np.ndarray, price: np.ndarray, target: float) -> float:
    """Full sort by ratio (numpy), the greedy's marginal row (Dantzig 1957)."""
    value = np.asarray(value, float)
    price = np.asarray(price, float)
    if value.size == 0:
        return 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(price == 0, np.inf, value / np.where(price == 0, 1.0, price))
    order = np.argsort(-r, kind="stable")
    cs = np.cumsum(price[order])
    t = max(target, 0.0)
    if not t < cs[-1]:
        return 0.0
    return float(r[order][np.searchsorted(cs, t, side="right")])


def _targets(price: np.ndarray, rng: np.random.Generator) -> list[float]:
    total = float(price.sum())
    cs = np.cumsum(price)
    exact = [float(x) for x in cs[: min(4, cs.size)]]  # targets equal to partial sums
    return [0.0, -1.0, total, total * 2 + 1, *exact,
            *rng.uniform(0, max(total, 1e-9), 6).tolist()]


# Dyadic prices and small integer values: sums are exact in float64, so "exactly equal to a
# cumulative sum" is tested without rounding doubt; many ties and zeros on purpose.
rows = st.lists(
    st.tuples(st.integers(0, 6), st.sampled_from([0.0, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0])),
    min_size=1, max_size=120,
)


@settings(max_examples=40, deadline=None)
@given(rows, st.lists(st.integers(1, 30), min_size=1, max_size=12), st.integers(0, 2**31))
def test_equals_full_sort_with_ties_and_zero_prices(data, batch_sizes, seed):
    value = np.array([d[0] for d in data], float)
    price = np.array([d[1] for d in data], float)
    rng = np.random.default_rng(seed)
    idx = ftl_index_new(len(data))
    i = 0
    b = 0
    while i < len(data):
        m = batch_sizes[b % len(batch_sizes)]
        b += 1
        ftl_insert(idx, value[i:i + m], price[i:i + m])
        i = min(i + m, len(data))
        assert ftl_count(idx) == i
        assert ftl_total_spend(idx) == pytest.approx(price[:i].sum(), abs=1e-12)
        for t in _targets(price[:i], rng):
            assert ftl_lambda_for_spend(idx, t) == brute_lambda(value[:i], price[:i], t)


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**31), st.integers(50, 3000), st.integers(1, 40))
def test_equals_full_sort_dense_buckets(seed, n, k):
    """Many distinct ratios inside one bucket (relative spread < 2**-11) and repeated
    queries, so the in-bucket selection and the sorted-bucket cache both run."""
    rng = np.random.default_rng(seed)
    value = 1.0 + rng.integers(0, 50, n) * 1e-7  # ratios within 5e-6 of each other
    price = rng.choice([0.5, 1.0, 2.0], n)
    value = value * price  # ratio = 1 + small, several rows per ratio value
    spread = rng.uniform(0.5, 2.0, n) < 0.1  # a few rows in other buckets
    value[spread] *= rng.uniform(0.1, 10.0, spread.sum())
    idx = ftl_index_new(n)
    cuts = np.linspace(0, n, k + 1).astype(int)
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        ftl_insert(idx, value[a:b], price[a:b])
        for frac in (0.3, 0.3, 0.31, 0.7, 0.3):
            t = frac * price[:b].sum()
            assert ftl_lambda_for_spend(idx, t) == brute_lambda(value[:b], price[:b], t)


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**31))
def test_equals_full_sort_random_floats_and_extremes(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 2000))
    value = rng.uniform(0, 0.1, n) * (rng.uniform(size=n) > 0.05)  # some zero values
    price = rng.lognormal(-5, 2, n) * (rng.uniform(size=n) > 0.05)  # some zero prices
    # far outside the range of the first batch: edge buckets
    value[rng.uniform(size=n) < 0.02] = 1e30
    price[rng.uniform(size=n) < 0.02] = 1e-30
    idx = ftl_index_new(n)
    for a in range(0, n, 97):
        ftl_insert(idx, value[a:a + 97], price[a:a + 97])
        seen = price[:a + 97].sum()
        for t in rng.uniform(0, seen, 4):
            assert ftl_lambda_for_spend(idx, t) == brute_lambda(value[:a + 97], price[:a + 97], t)


def test_matches_hindsight_solve():
    """Same multiplier as the project's hindsight solver over the same rows."""
    hindsight = pytest.importorskip(
        "replay.kernels.hindsight", reason="replay.kernels.hindsight not available yet")
    rng = np.random.default_rng(3)
    n = 20_000
    value = rng.uniform(0, 0.05, n)
    price = rng.lognormal(-5, 1, n)
    price[:50] = 0.0
    value[50:100] = 0.0
    idx = ftl_index_new(n)
    for a in range(0, n, 1000):
        ftl_insert(idx, value[a:a + 1000], price[a:a + 1000])
        for frac in (0.05, 0.4, 0.9, 1.5):
            budget = frac * price[:a + 1000].sum()
            ref = hindsight.solve(value[:a + 1000], price[:a + 1000], budget).lambda_
            assert ftl_lambda_for_spend(idx, budget) == ref


@njit(cache=False)
def _inside_njit(value, price, batch, frac):
    idx = ftl_index_new(value.shape[0])
    out = np.empty(value.shape[0] // batch)
    for k in range(out.shape[0]):
        ftl_insert(idx, value[k * batch:(k + 1) * batch], price[k * batch:(k + 1) * batch])
        out[k] = ftl_lambda_for_spend(idx, frac * ftl_total_spend(idx))
    return out, ftl_count(idx), ftl_capacity(idx)


def test_callable_from_njit():
    rng = np.random.default_rng(5)
    value = rng.uniform(0, 1, 1000)
    price = rng.uniform(0, 1, 1000)
    lam, count, cap = _inside_njit(value, price, 100, 0.25)
    assert count == 1000 and cap == 1000
    for k in range(10):
        s = (k + 1) * 100
        assert lam[k] == brute_lambda(value[:s], price[:s], 0.25 * price[:s].sum())


def test_empty_and_bad_input():
    idx = ftl_index_new(3)
    assert ftl_lambda_for_spend(idx, 1.0) == 0.0
    assert ftl_count(idx) == 0
    ftl_insert(idx, np.zeros(0), np.zeros(0))
    with pytest.raises(ValueError, match="capacity"):
        ftl_insert(idx, np.ones(4), np.ones(4))
    with pytest.raises(ValueError, match=">= 0"):
        ftl_insert(idx, np.array([1.0]), np.array([-1.0]))
    with pytest.raises(ValueError, match=">= 0"):
        ftl_insert(idx, np.array([np.nan]), np.array([1.0]))
    with pytest.raises(ValueError, match=">= 0"):  # a bad last row: nothing is inserted
        ftl_insert(idx, np.array([1.0, 1.0]), np.array([1.0, -1.0]))
    assert ftl_count(idx) == 0 and ftl_total_spend(idx) == 0.0
    with pytest.raises(ValueError, match="same length"):
        ftl_insert(idx, np.ones(2), np.ones(1))
    ftl_insert(idx, np.array([1.0, 2.0]), np.array([1.0, 1.0]))
    with pytest.raises(ValueError, match="NaN"):
        ftl_lambda_for_spend(idx, np.nan)
    # Greedy by hand: ratio 2 first (cost 1), then ratio 1 (cost 1).
    assert ftl_lambda_for_spend(idx, 0.5) == 2.0
    assert ftl_lambda_for_spend(idx, 1.0) == 1.0  # cost exactly 1 reached: next row marginal
    assert ftl_lambda_for_spend(idx, 2.0) == 0.0  # everything affordable


def test_reset_index_equals_fresh_and_band_moves_stay_exact():
    # Reference: a full sort by decreasing ratio (the definition in the module docstring).
    # Targets that jump across the whole range force the band of row-keeping buckets to
    # move many times; a reset index must answer exactly like a fresh one.
    from replay.kernels.ftl_index import ftl_band_moves, ftl_index_reset

    rng = np.random.default_rng(7)
    n = 20_000
    value = rng.lognormal(0.0, 1.0, n)
    price = rng.lognormal(0.0, 1.5, n)
    used = ftl_index_new(n)
    ftl_insert(used, value[::-1].copy(), price[::-1].copy())
    ftl_lambda_for_spend(used, float(price.sum()) / 3)
    ftl_index_reset(used)
    fresh = ftl_index_new(n)
    for lo in range(0, n, 2000):
        for idx in (used, fresh):
            ftl_insert(idx, value[lo:lo + 2000], price[lo:lo + 2000])
        seen = slice(0, lo + 2000)
        v, p = value[seen], price[seen]
        o = np.argsort(-(v / p), kind="stable")
        c = np.cumsum(p[o])
        for t in rng.uniform(0, c[-1], 5):
            want = (v / p)[o][np.searchsorted(c, t, side="right")]
            assert ftl_lambda_for_spend(fresh, t) == want
            assert ftl_lambda_for_spend(used, t) == want
    assert ftl_band_moves(fresh) >= 3
