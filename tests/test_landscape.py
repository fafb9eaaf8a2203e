"""Bid shading against textbook best responses, scipy.stats and a brute-force argmax."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from replay.kernels.landscape import (
    best_response,
    empirical_knots,
    fit_shading,
    shade,
    shade_many,
)

PLACEMENTS = [("feed", "first_price"), ("partner", "second_price"), ("unseen", "first_price")]


def _dkw_eps(n: int, alpha: float = 1e-6) -> float:
    """Dvoretzky-Kiefer-Wolfowitz (Massart 1990): P(sup|F_n - F| > eps) <= 2 exp(-2 n eps^2)."""
    return math.sqrt(math.log(2.0 / alpha) / (2.0 * n))


def test_second_price_bids_the_value():
    # Source: Vickrey (1961), bidding one's value is dominant in a second-price auction; with a
    # budget multiplier the value is the budget-adjusted one (Balseiro, Lu, Mirrokni 2023).
    rng = np.random.default_rng(0)
    price = rng.uniform(0, 1, 500)
    code = np.ones(500, dtype=np.int32)
    tab = fit_shading(price, code, PLACEMENTS)
    w = rng.uniform(0, 3, 200)
    np.testing.assert_array_equal(shade_many(w, np.ones(200, int), tab), w)
    assert tab.max_logged_price[1] == price.max()


def test_absent_first_price_placement_falls_back_to_identity():
    tab = fit_shading(np.array([0.5, 0.7]), np.array([0, 0]), PLACEMENTS)
    assert tab.fallback.tolist() == [False, False, True]
    assert tab.n_train.tolist() == [2, 0, 0]
    assert np.isnan(tab.max_logged_price[2])
    w = np.array([0.1, 1.0, 5.0])
    np.testing.assert_array_equal(shade_many(w, np.full(3, 2), tab), w)
    # an unknown code is identity too, not a crash
    assert shade(1.0, 7, tab.offsets, tab.knots_w, tab.knots_b, tab.linear,
                 tab.first_price) == 1.0


@pytest.mark.parametrize("m", [1.0, 2.5])
@pytest.mark.parametrize("w", [0.1, 0.8, 1.9, 3.0, 5.0, 9.0])
def test_uniform_landscape_textbook(m, w):
    # Source: standard textbook exercise: against a competing bid uniform on [0, m],
    # argmax_b (w - b) b / m = min(w / 2, m).
    cdf = lambda b: np.clip(np.asarray(b) / m, 0.0, 1.0)  # noqa: E731
    assert best_response(w, cdf, m) == pytest.approx(min(w / 2, m), rel=1e-9)


def test_uniform_empirical_table_converges():
    # Source: standard textbook exercise (min(w/2, m)); tolerance from the DKW inequality:
    # the empirical surplus is within w*eps of the true one everywhere, so the table's bid
    # loses at most 2 w eps of true surplus, and (w-b) b/m drops by (b-b*)^2/m, giving
    # |b - b*| <= sqrt(2 w eps m).
    m = 2.0
    n = 400_000
    rng = np.random.default_rng(11)
    tab = fit_shading(rng.uniform(0, m, n), np.zeros(n, int), PLACEMENTS)
    eps = _dkw_eps(n)
    for w in (0.3, 1.0, 2.0, 3.0, 3.9, 6.0):
        b = shade_many(np.array([w]), np.zeros(1, int), tab)[0]
        best = min(w / 2, m)
        true = lambda x, w=w: (w - x) * min(x / m, 1.0)  # noqa: E731
        assert true(b) >= true(best) - 2 * w * eps
        assert abs(b - best) <= math.sqrt(2 * w * eps * m)
        assert b <= w


@pytest.mark.parametrize("n", [2, 3, 5])
@pytest.mark.parametrize("v", [0.2, 0.55, 1.0])
def test_symmetric_first_price_equilibrium(n, v):
    # Source: Krishna, Auction Theory (2nd ed.), ch. 2: with n bidders, values i.i.d. U[0,1],
    # the symmetric equilibrium bid is b(v) = (n-1)/n v; the highest of the other n-1 bids is
    # then below b with probability G(b) = (n b / (n-1))^(n-1) on [0, (n-1)/n], and the
    # best response to it at value v is the equilibrium bid itself.
    top = (n - 1) / n
    cdf = lambda b: np.clip(np.asarray(b) / top, 0.0, 1.0) ** (n - 1)  # noqa: E731
    assert best_response(v, cdf, top) == pytest.approx(top * v, rel=1e-8)


@pytest.mark.parametrize("n", [2, 3, 5])
def test_symmetric_equilibrium_from_samples(n):
    # Source: Krishna, Auction Theory, ch. 2 (as above); samples: the highest of n-1 bids
    # (n-1)/n U_i. Tolerance: DKW as in the uniform test; the true surplus is within 2 v eps
    # of the optimum.
    rng = np.random.default_rng(n)
    size = 300_000
    top = (n - 1) / n
    sample = top * rng.uniform(0, 1, (size, n - 1)).max(axis=1)
    tab = fit_shading(sample, np.zeros(size, int), PLACEMENTS)
    eps = _dkw_eps(size)
    for v in (0.3, 0.6, 0.9):
        b = shade_many(np.array([v]), np.zeros(1, int), tab)[0]
        true = lambda x, v=v: (v - x) * min(x / top, 1.0) ** (n - 1)  # noqa: E731
        assert true(b) >= true(top * v) - 2 * v * eps
        assert b == pytest.approx(top * v, abs=0.05)


def _brute(prices: np.ndarray, w: float) -> tuple[float, float]:
    """argmax over the sample prices of (w - p) G_n(p), smallest on ties; w if none > 0."""
    u = np.unique(prices)
    g = np.searchsorted(np.sort(prices), u, side="right") / prices.size
    s = (w - u) * g
    j = int(np.argmax(s))
    if s[j] <= 0:
        return w, 0.0
    return float(u[j]), float(s[j])


@settings(max_examples=50, deadline=None)
@given(st.lists(st.integers(0, 40), min_size=1, max_size=60),
       st.lists(st.one_of(st.just(0.0), st.floats(1e-6, 6.0)), min_size=1, max_size=30))
def test_empirical_table_is_the_brute_force_argmax(ints, ws):
    prices = np.array(ints, float) / 8.0  # ties and zeros on purpose
    tab = fit_shading(prices, np.zeros(prices.size, int), PLACEMENTS)
    w = np.sort(np.array(ws))
    b = shade_many(w, np.zeros(w.size, int), tab)
    g = lambda x: np.mean(prices <= x)  # noqa: E731
    for wi, bi in zip(w, b, strict=True):
        ref_b, ref_s = _brute(prices, wi)
        assert bi <= wi
        got = (wi - bi) * g(bi)
        assert got == pytest.approx(ref_s, abs=1e-12)
        if ref_s > 0:
            # unique best bid or the smallest of tied ones
            assert bi == ref_b or abs(got - ref_s) <= 1e-12 * max(1.0, ref_s)
        else:
            assert bi == wi
    assert np.all(np.diff(b) >= 0)  # non-decreasing in w


def test_candidate_subsample_keeps_exact_g():
    rng = np.random.default_rng(2)
    prices = rng.uniform(0, 1, 5000)
    kw, kb = empirical_knots(prices, max_candidates=200)
    assert np.all(np.diff(kw) > 0)
    assert np.all(np.isin(kb, prices))  # every bid is a training price
    # the surplus with 200 rank-spaced candidates stays close to the full optimum
    g = lambda x: np.mean(prices <= x)  # noqa: E731
    for w in (0.4, 0.9, 1.5):
        i = np.searchsorted(kw, w) - 1
        b = kb[i] if i >= 0 else w
        assert (w - b) * g(b) >= _brute(prices, w)[1] - 1.0 / 200 * w


def test_lognormal_model_against_scipy():
    # Source: scipy.stats.lognorm.fit (MLE with loc=0) and scipy.stats.lognorm.cdf as the
    # landscape; the table interpolates b*(w) linearly between 256 log-spaced knots.
    rng = np.random.default_rng(4)
    price = rng.lognormal(-1.0, 0.6, 20_000)
    price[:2000] = 0.0  # point mass at 0 (10 %)
    tab = fit_shading(price, np.zeros(price.size, int), PLACEMENTS, model="lognormal")
    assert tab.linear[0] and tab.model == "lognormal"
    pos = price[price > 0]
    s, _, scale = scipy.stats.lognorm.fit(pos, floc=0)
    pi0 = 0.1
    cdf = lambda b: pi0 + (1 - pi0) * scipy.stats.lognorm.cdf(b, s, scale=scale)  # noqa: E731
    w = np.array([0.05, 0.2, 0.4, 0.8, 1.5, 3.0])
    got = shade_many(w, np.zeros(w.size, int), tab)
    for wi, gi in zip(w, got, strict=True):
        ref = best_response(wi, cdf, scale * math.exp(12 * s))
        assert gi == pytest.approx(ref, rel=2e-3, abs=1e-6)
        assert gi <= wi


def test_lognormal_falls_back_when_degenerate():
    tab = fit_shading(np.array([0.5, 0.5, 0.0]), np.zeros(3, int), PLACEMENTS, model="lognormal")
    assert not tab.linear[0]
    assert shade_many(np.array([2.0]), np.zeros(1, int), tab)[0] == 0.5


def test_bad_input():
    with pytest.raises(ValueError, match="empirical, lognormal"):
        fit_shading(np.ones(2), np.zeros(2, int), PLACEMENTS, model="kernel")
    with pytest.raises(ValueError, match="finite and >= 0"):
        fit_shading(np.array([-1.0]), np.zeros(1, int), PLACEMENTS)
    with pytest.raises(ValueError, match="placement code"):
        fit_shading(np.ones(2), np.array([0, 3]), PLACEMENTS)
    with pytest.raises(ValueError, match="pricing"):
        fit_shading(np.ones(1), np.zeros(1, int), [("feed", "auction")])


def test_step_table_worked_example():
    # Worked by hand: prices 1, 2, 3, 4 give G = 1/4, 1/2, 3/4, 1 and surplus lines
    # G_j (w - p_j); their upper envelope switches bid at w = 3 (1 -> 2), 5 (2 -> 3) and
    # 7 (3 -> 4); at a switch point both bids tie and the smaller one is kept.
    tab = fit_shading(np.array([4.0, 2.0, 1.0, 3.0]), np.zeros(4, int), PLACEMENTS)
    w = np.array([0.5, 1.0, 2.0, 3.0, 3.5, 5.0, 6.0, 7.0, 7.5, 100.0])
    expected = [0.5, 1.0, 1.0, 1.0, 2.0, 2.0, 3.0, 3.0, 4.0, 4.0]
    np.testing.assert_array_equal(shade_many(w, np.zeros(w.size, int), tab), expected)
