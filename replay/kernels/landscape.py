"""Landscapes and first-price bid shading.

A landscape ``G`` is the CDF of ``min_win_price`` (currency per impression) for one
placement, fit on a training window that ends before the replay window. On a first-price
placement the rule's budget-adjusted value ``w`` (currency per impression) becomes the bid

    b*(w) = argmax_{0 <= b <= w} (w - b) G(b)

(expected surplus of a win times the chance to win). Ties go to the smallest maximizing
bid. When no bid has a positive expected surplus (``w`` at or below every training price)
the bid is ``w`` itself: it cannot lose anything. Second-price placements bid ``w``.

Models (``fit_shading(model=...)``):

- ``"empirical"`` (default): ``G`` is the empirical CDF of the training prices. The maximizer
  is always one of the training prices ``p_j`` (with ``G_j`` = share of prices <= ``p_j``),
  and for fixed ``j`` the surplus ``G_j w - G_j p_j`` is a line in ``w``; so ``b*(w)`` is a
  step function whose steps are the upper envelope of those lines, built exactly by one
  convex-hull pass over the sorted prices (O(n log n)). A placement with more than
  ``MAX_CANDIDATES`` distinct training prices keeps that many candidate bids, evenly spaced
  in rank (the smallest and largest always kept) and each with its exact full-sample
  ``G``: the answer is then the best bid among those candidates, not a re-sampled CDF.
- ``"lognormal"``: a point mass at 0 (share of zero prices) plus a log-normal fit (maximum
  likelihood on log prices) of the positive prices; ``b*(w)`` is solved numerically on
  ``LOGNORMAL_KNOTS`` log-spaced values of ``w`` and interpolated linearly. A placement with
  fewer than two distinct positive prices falls back to the empirical table.

Placements absent from the training window bid ``w`` (identity); for a first-price
placement that is a fallback, recorded in ``ShadingTables.fallback``.

Tables are flat numpy arrays (``ShadingTables``) so the ``@njit`` function ``shade`` can be
called from the replay loop.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from numba import njit

from replay.schema import FIRST_PRICE, PRICING_RULES

#: Most candidate bids per placement in an empirical table.
MAX_CANDIDATES = 100_000
#: Knots per placement of a log-normal table.
LOGNORMAL_KNOTS = 256
MODELS = ("empirical", "lognormal")

_GRID = 2049  # dense grid points of the numeric solver
_GOLDEN_STEPS = 80
_BISECT_STEPS = 60


@dataclass(frozen=True)
class ShadingTables:
    """Best-response tables of all placements of a campaign (numba-friendly flat arrays).

    Placement ``p`` uses ``knots_w[offsets[p]:offsets[p+1]]`` and the same slice of
    ``knots_b``; an empty slice means identity (bid ``w``). Values are currency per
    impression.
    """

    offsets: np.ndarray  # int64[P+1]
    knots_w: np.ndarray  # float64, ascending within a placement: budget-adjusted values
    knots_b: np.ndarray  # float64, bids at those knots
    linear: np.ndarray  # bool[P]: True = linear interpolation, False = step
    first_price: np.ndarray  # bool[P]; False = identity (second price: bid w)
    max_logged_price: np.ndarray  # float64[P] largest training min_win_price; NaN if none
    # Additive extras (not needed by ``shade``):
    fallback: np.ndarray = field(default_factory=lambda: np.zeros(0, np.bool_))
    # bool[P]: first-price placement without training prices, so identity is used
    n_train: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    # int64[P]: training rows per placement
    model: str = "empirical"
    placements: tuple[tuple[str, str], ...] = ()

    @property
    def n_placements(self) -> int:
        return int(self.first_price.shape[0])


@njit(cache=True, nogil=True)
def shade(w: float, p: int, offsets: np.ndarray, knots_w: np.ndarray, knots_b: np.ndarray,
          linear: np.ndarray, first_price: np.ndarray) -> float:
    """Bid (currency per impression) for budget-adjusted value ``w`` on placement ``p``.

    Second price, an unknown placement code or an empty table: ``w``. Step tables (empirical):
    ``w`` up to the first knot (no positive surplus), else the bid of the last knot below
    ``w``; beyond the last knot the last bid (the largest training price already wins with
    ``G = 1``). Linear tables (log-normal): proportional below the first knot, linear
    interpolation between knots, linear extrapolation beyond the last one; never above ``w``.
    """
    if p < 0 or p >= first_price.shape[0] or not first_price[p]:
        return w
    lo = offsets[p]
    hi = offsets[p + 1]
    if hi <= lo or not (w > 0.0):
        return w
    # i = number of knots strictly below w
    a = lo
    b = hi
    while a < b:
        mid = (a + b) >> 1
        if knots_w[mid] < w:
            a = mid + 1
        else:
            b = mid
    i = a
    if not linear[p]:
        if i == lo:
            return w
        return knots_b[i - 1]
    if i == lo:
        w0 = knots_w[lo]
        out = w * knots_b[lo] / w0 if w0 > 0.0 else w
    else:
        j = i if i < hi else hi - 1
        if j == lo:
            out = knots_b[lo]
        else:
            x0 = knots_w[j - 1]
            x1 = knots_w[j]
            y0 = knots_b[j - 1]
            y1 = knots_b[j]
            # A flat segment is flat all the way (w = inf would give 0 * inf = NaN).
            out = y0 if y1 == y0 else y0 + (y1 - y0) * (w - x0) / (x1 - x0)
    if out > w:
        out = w
    if out < 0.0:
        out = 0.0
    return out


@njit(cache=True, nogil=True)
def _shade_many(w, code, offsets, knots_w, knots_b, linear, first_price):
    out = np.empty(w.shape[0], np.float64)
    for i in range(w.shape[0]):
        out[i] = shade(w[i], code[i], offsets, knots_w, knots_b, linear, first_price)
    return out


def shade_many(w: np.ndarray, placement_code: np.ndarray, tables: ShadingTables) -> np.ndarray:
    """Bids for arrays of budget-adjusted values and placement codes (same length)."""
    w = np.ascontiguousarray(w, dtype=np.float64)
    code = np.ascontiguousarray(placement_code, dtype=np.int64)
    if w.shape != code.shape:
        raise ValueError("shade_many: w and placement_code must have the same shape")
    return _shade_many(w.ravel(), code.ravel(), tables.offsets, tables.knots_w, tables.knots_b,
                       tables.linear, tables.first_price).reshape(w.shape)


# ---------------------------------------------------------------- empirical (exact) tables


@njit(cache=True, nogil=True)
def _upper_envelope(u: np.ndarray, k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Step knots of argmax_j k_j (w - u_j) over w, for u ascending and k strictly ascending.

    Lines with slope k_j and root u_j; returns (knots_w, knots_b): knots_w[0] = u of the first
    line (surplus turns positive there), then the breakpoints; knots_b the chosen u's.
    """
    n = u.shape[0]
    hull = np.empty(n, np.int64)
    brk = np.empty(n, np.float64)  # brk[h] = w where hull[h] overtakes hull[h-1]
    m = 0
    for j in range(n):
        while m >= 1:
            b = hull[m - 1]
            # w where line j overtakes line b: u_j + k_b (u_j - u_b) / (k_j - k_b)
            x = u[j] + k[b] * (u[j] - u[b]) / (k[j] - k[b])
            if m >= 2 and x <= brk[m - 1]:
                m -= 1  # b is never strictly best: drop it (ties go to the smaller bid)
            else:
                break
        if m >= 1:
            b = hull[m - 1]
            brk[m] = u[j] + k[b] * (u[j] - u[b]) / (k[j] - k[b])
        hull[m] = j
        m += 1
    kw = np.empty(m, np.float64)
    kb = np.empty(m, np.float64)
    kw[0] = u[hull[0]]
    kb[0] = u[hull[0]]
    for h in range(1, m):
        kw[h] = brk[h]
        kb[h] = u[hull[h]]
    return kw, kb


def empirical_knots(prices: np.ndarray,
                    max_candidates: int = MAX_CANDIDATES) -> tuple[np.ndarray, np.ndarray]:
    """Exact step knots (knots_w, knots_b) of the best response to the empirical CDF."""
    p = np.sort(np.asarray(prices, dtype=np.float64))
    n = p.shape[0]
    if n == 0:
        return np.zeros(0), np.zeros(0)
    # distinct values and the count of prices <= each
    last = np.flatnonzero(np.r_[p[1:] != p[:-1], True])
    u = p[last]
    k = (last + 1).astype(np.float64)
    if u.shape[0] > max_candidates:
        keep = np.unique(np.round(np.linspace(0, u.shape[0] - 1, max_candidates)).astype(np.int64))
        u = u[keep]
        k = k[keep]
    kw, kb = _upper_envelope(u, k)
    # Rounding can make a breakpoint equal to its neighbour; keep knots ascending.
    keep = np.r_[True, kw[1:] > kw[:-1]]
    return kw[keep], kb[keep]


# ---------------------------------------------------------------- numeric best response


def _objective(w: np.ndarray, b: np.ndarray, cdf: Callable[[np.ndarray], np.ndarray]):
    return (w - b) * np.asarray(cdf(b), dtype=np.float64)


def best_response_many(w: np.ndarray, cdf: Callable[[np.ndarray], np.ndarray],
                       upper: float | np.ndarray) -> np.ndarray:
    """Vectorized ``best_response``: one bid per entry of ``w``.

    Dense grid over [0, min(w, upper)] (first maximum: the smallest bid on ties), golden
    section inside the best grid cell, then bisection on the sign of a central-difference
    derivative of the surplus, which resolves the flat top beyond what comparing surplus
    values can (about 1e-9 relative for smooth CDFs; for non-smooth ones the golden-section
    answer is kept).
    """
    w = np.atleast_1d(np.asarray(w, dtype=np.float64))
    hi = np.minimum(w, np.broadcast_to(np.asarray(upper, dtype=np.float64), w.shape))
    hi = np.where(hi > 0, hi, 0.0)
    t = np.linspace(0.0, 1.0, _GRID)
    grid = hi[:, None] * t[None, :]
    f = _objective(w[:, None], grid, cdf)
    j = np.argmax(f, axis=1)
    rows = np.arange(w.shape[0])
    fbest = f[rows, j]
    step = hi / (_GRID - 1)
    a = np.maximum(grid[rows, j] - step, 0.0)
    c = np.minimum(grid[rows, j] + step, hi)
    # golden section (maximize)
    g = (math.sqrt(5.0) - 1.0) / 2.0
    x1 = c - g * (c - a)
    x2 = a + g * (c - a)
    f1 = _objective(w, x1, cdf)
    f2 = _objective(w, x2, cdf)
    for _ in range(_GOLDEN_STEPS):
        left = f1 >= f2  # keep [a, x2]; ties lean to the smaller bid
        c = np.where(left, x2, c)
        a = np.where(left, a, x1)
        keep = np.where(left, x1, x2)  # the interior point that stays
        fkeep = np.where(left, f1, f2)
        new = np.where(left, c - g * (c - a), a + g * (c - a))
        fnew = _objective(w, new, cdf)
        x1 = np.where(left, new, keep)
        f1 = np.where(left, fnew, fkeep)
        x2 = np.where(left, keep, new)
        f2 = np.where(left, fkeep, fnew)
    bg = np.where(f1 >= f2, x1, x2)
    fg = _objective(w, bg, cdf)
    # keep the grid point if the refinement did not beat it (non-smooth CDFs)
    use_grid = fbest > fg
    b = np.where(use_grid, grid[rows, j], bg)
    b = _refine_derivative(w, b, hi, cdf)
    fb = _objective(w, b, cdf)
    # The ends of the range: a maximum at b = min(w, upper) or at b = 0 (a point mass) is
    # where the derivative test cannot apply; ties go to the smaller bid.
    fhi = _objective(w, hi, cdf)
    # Left derivative at the upper end: not negative means the maximum sits at the end (a
    # kink of the CDF there, e.g. the top of its support, hides it from the bisection).
    hh = 1e-7 * np.maximum(hi, 1e-300)
    ghi = np.asarray(cdf(hi), dtype=np.float64)
    dleft = -ghi + (w - hi) * (ghi - np.asarray(cdf(hi - hh), dtype=np.float64)) / hh
    at_end = (fhi > fb) | ((dleft >= -1e-9 * np.maximum(ghi, 1e-300)) & (hi > 0)
                           & (fhi >= fb - 1e-10 * np.abs(fb)))
    b = np.where(at_end, hi, b)
    fb = np.maximum(fb, fhi)
    f0 = _objective(w, np.zeros_like(w), cdf)
    b = np.where(f0 >= fb, 0.0, b)
    fb = np.maximum(fb, f0)
    return np.where(np.maximum(fbest, fb) > 0.0, b, w)


def _refine_derivative(w, b, hi, cdf):
    """Bisection on the sign of d/db (w - b) G(b) around b; unchanged where signs disagree."""
    scale = np.maximum(np.abs(b), 1e-300)
    h = 1e-6 * scale

    def deriv(x):
        hx = np.minimum(h, np.maximum(x, 1e-300))
        gp = (np.asarray(cdf(x + hx), dtype=np.float64)
              - np.asarray(cdf(np.maximum(x - hx, 0.0)), dtype=np.float64)) / (
            (x + hx) - np.maximum(x - hx, 0.0))
        return -np.asarray(cdf(x), dtype=np.float64) + (w - x) * gp

    width = 1e-6 * scale
    lo = np.maximum(b - width, 0.0)
    up = np.minimum(b + width, hi)
    dlo = deriv(lo)
    dup = deriv(up)
    ok = (dlo > 0) & (dup < 0) & (up > lo)
    if not ok.any():
        return b
    lo2 = lo.copy()
    up2 = up.copy()
    for _ in range(_BISECT_STEPS):
        mid = 0.5 * (lo2 + up2)
        dm = deriv(mid)
        pos = dm > 0
        lo2 = np.where(pos, mid, lo2)
        up2 = np.where(pos, up2, mid)
    refined = 0.5 * (lo2 + up2)
    fb = _objective(w, b, cdf)
    fr = _objective(w, refined, cdf)
    # accept only where the derivative bracketed a maximum and the surplus did not drop
    # by more than rounding
    good = ok & (fr >= fb - 1e-12 * np.abs(fb))
    return np.where(good, refined, b)


def best_response(w: float, cdf: Callable[[np.ndarray], np.ndarray], upper: float) -> float:
    """argmax_{0 <= b <= w} (w - b) cdf(b) for a vectorized CDF ``cdf`` of the minimum winning
    price, with ``cdf(b) = 1`` for ``b >= upper`` (currency per impression). Returns ``w``
    when no bid has a positive expected surplus."""
    return float(best_response_many(np.array([w], dtype=np.float64), cdf, upper)[0])


# ---------------------------------------------------------------- log-normal tables


def lognormal_cdf(pi0: float, mu: float, sigma: float) -> Callable[[np.ndarray], np.ndarray]:
    """CDF of a point mass ``pi0`` at 0 plus a log-normal(mu, sigma) share of ``1 - pi0``."""

    def cdf(b: np.ndarray) -> np.ndarray:
        b = np.asarray(b, dtype=np.float64)
        return _lognormal_cdf(b.ravel(), pi0, mu, sigma).reshape(b.shape)

    return cdf


@njit(cache=True, nogil=True)
def _lognormal_cdf(b: np.ndarray, pi0: float, mu: float, sigma: float) -> np.ndarray:
    out = np.empty(b.shape[0], np.float64)
    k = 1.0 / (sigma * math.sqrt(2.0))
    for i in range(b.shape[0]):
        x = b[i]
        if x > 0.0:
            out[i] = pi0 + (1.0 - pi0) * 0.5 * math.erfc(-(math.log(x) - mu) * k)
        elif x == 0.0:
            out[i] = pi0
        else:
            out[i] = 0.0
    return out


def lognormal_knots(prices: np.ndarray,
                    n_knots: int = LOGNORMAL_KNOTS) -> tuple[np.ndarray, np.ndarray] | None:
    """Linear knots of the best response to a fitted zero-mass + log-normal landscape, or
    None when the positive prices have fewer than two distinct values."""
    p = np.asarray(prices, dtype=np.float64)
    pos = p[p > 0]
    if np.unique(pos).shape[0] < 2:
        return None
    pi0 = 1.0 - pos.shape[0] / p.shape[0]
    lp = np.log(pos)
    mu = float(lp.mean())
    sigma = float(lp.std())
    cdf = lognormal_cdf(pi0, mu, sigma)
    w = np.exp(np.linspace(mu - 4.0 * sigma, mu + 6.0 * sigma, n_knots))
    upper = math.exp(mu + 12.0 * sigma)
    b = best_response_many(w, cdf, upper)
    return w, np.minimum(b, w)


# ---------------------------------------------------------------- fitting


def fit_shading(train_price: np.ndarray, train_placement: np.ndarray,
                placements: Sequence[tuple[str, str]],
                model: str = "empirical") -> ShadingTables:
    """Shading tables for every placement from training prices.

    ``train_price``: min_win_price of training rows (currency per impression, >= 0);
    ``train_placement``: their codes into ``placements`` (a sequence of (placement,
    pricing)); ``model``: "empirical" or "lognormal".
    """
    if model not in MODELS:
        raise ValueError(f"unknown landscape model {model!r}; allowed: {', '.join(MODELS)}")
    price = np.asarray(train_price, dtype=np.float64).ravel()
    code = np.asarray(train_placement).ravel().astype(np.int64)
    if price.shape != code.shape:
        raise ValueError("fit_shading: train_price and train_placement differ in length")
    n_pl = len(placements)
    if price.size and not (np.isfinite(price).all() and (price >= 0).all()):
        raise ValueError("fit_shading: training min_win_price must be finite and >= 0")
    if code.size and (code.min() < 0 or code.max() >= n_pl):
        raise ValueError(f"fit_shading: placement code outside 0..{n_pl - 1}")
    for name, pricing in placements:
        if pricing not in PRICING_RULES:
            raise ValueError(f"placement {name!r}: pricing {pricing!r} is not one of "
                             f"{', '.join(PRICING_RULES)}")
    order = np.argsort(code, kind="stable")
    sorted_code = code[order]
    bounds = np.searchsorted(sorted_code, np.arange(n_pl + 1))
    first_price = np.array([pr == FIRST_PRICE for _, pr in placements], dtype=np.bool_)
    linear = np.zeros(n_pl, np.bool_)
    fallback = np.zeros(n_pl, np.bool_)
    n_train = np.diff(bounds).astype(np.int64)
    max_logged = np.full(n_pl, np.nan)
    kws: list[np.ndarray] = []
    kbs: list[np.ndarray] = []
    for p in range(n_pl):
        pr = price[order[bounds[p]:bounds[p + 1]]]
        if pr.size:
            max_logged[p] = pr.max()
        kw = kb = np.zeros(0)
        if first_price[p]:
            if pr.size == 0:
                fallback[p] = True
            else:
                res = lognormal_knots(pr) if model == "lognormal" else None
                if res is not None:
                    kw, kb = res
                    linear[p] = True
                else:
                    kw, kb = empirical_knots(pr)
        kws.append(kw)
        kbs.append(kb)
    offsets = np.zeros(n_pl + 1, np.int64)
    offsets[1:] = np.cumsum([k.shape[0] for k in kws])
    return ShadingTables(
        offsets=offsets,
        knots_w=np.concatenate(kws) if kws else np.zeros(0),
        knots_b=np.concatenate(kbs) if kbs else np.zeros(0),
        linear=linear, first_price=first_price, max_logged_price=max_logged,
        fallback=fallback, n_train=n_train, model=model,
        placements=tuple((str(a), str(b)) for a, b in placements),
    )
