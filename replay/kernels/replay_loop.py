"""The replay loop: one campaign's logged auctions in time order, as if a rule had bid.

Semantics (per row, in ``ts`` order):
* bid ``w = value * (1 + mu*C) / (max(lambda, 1e-12) + mu)`` (currency per impression; a
  fixed-bid rule bids its placement's price instead), shaded with ``shade`` on first-price
  rows (the bid is never above ``w``: shading only lowers a bid);
* win iff ``bid >= min_win_price``; price = ``min_win_price`` (second price) or ``bid``
  (first price);
* charge = price (``expected``) or, ``sampled``, price / charge_prob with probability
  charge_prob, from one uniform per row drawn in row order (independent of the schedule);
* budget: once realized spend >= budget no more bids, so spend <= budget + one charge.

Updates: the rows are cut into intervals (every ``every_us`` of log time from the flight
start, or every ``every_n`` rows). The multiplier used on interval k is the one decided at
the end of interval k-1 from the feedback vector ``fb`` (indexes ``FB_*`` below) of the
rows before it: a rule cannot see the future.

``replay_fused`` is ONE compiled loop that calls the rule's ``@njit`` update at every
boundary (numba compiles it once per update function). The engine's generic path (a rule
with a Python ``update``) runs the same function one interval per call with the no-op
``no_update`` and calls the Python update in between, so both paths share every line.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from replay.kernels.ftl_index import ftl_insert, ftl_lambda_for_spend
from replay.kernels.landscape import shade

# fb: feedback vector filled at the end of each interval (float64[FB_SIZE]).
FB_K = 0  # interval index, 0-based
FB_AUCTIONS = 1  # rows in the interval
FB_WINS = 2
FB_RESULTS = 3  # sum of value over won rows
FB_SPEND = 4  # realized charges (currency)
FB_EXPECTED_SPEND = 5  # sum of prices of won rows (currency)
FB_TARGET = 6  # target spend of the interval: budget * (F(t_end) - F(t_start))
FB_CUM_SPEND = 7  # realized, since the flight start
FB_CUM_EXPECTED = 8
FB_CUM_TARGET = 9  # budget * F(t_end)
FB_CUM_RESULTS = 10
FB_REMAINING = 11  # budget - cumulative realized spend
FB_T_START = 12  # microseconds UTC (exact in float64)
FB_T_END = 13  # the decision time
FB_BUDGET = 14
FB_REMAINING_SHARE = 15  # 1 - F(t_end): share of the target curve still ahead
FB_ROWS_SEEN = 16  # replay rows before the decision
FB_NORM = 17  # spend normalizer: budget / expected number of intervals (see engine)
FB_EXHAUSTED = 18  # 1.0 once the budget is spent
FB_EXPECTED_AUCTIONS = 19  # forecast auctions in the flight (NaN without training rows)
FB_SIZE = 20

STATE_LAMBDA = 0  # results per currency
STATE_MU = 1  # cap multiplier, results per currency
STATE_QUERY = 2  # index rules: spend target for ftl_lambda_for_spend (NaN = no query)

LAMBDA_FLOOR = 1e-12
#: Finite stand-in for "bid nothing" (w = 0 up to 1e-300 of value).
NO_BID_LAMBDA = 1e300

# acc: running totals over the replay (float64[ACC_SIZE]).
ACC_SPEND = 0
ACC_EXPECTED = 1
ACC_RESULTS = 2
ACC_WINS = 3
ACC_BIDS = 4  # rows bid on (before exhaustion)
ACC_ABOVE = 5  # bids above the placement's largest training min_win_price
ACC_MIN_COST = 6  # sum of min_win_price over won rows (C_won)
ACC_EXHAUSTED_TS = 7  # ts of the row that spent the budget, -1 if never
ACC_ROWS = 8  # rows processed
ACC_CUM_TARGET = 9
ACC_LAST_CHARGE = 10  # charge of the last won row (the one that may cross the budget)
ACC_F_END = 11  # target curve share at the end of the last interval
ACC_POS = 12  # next row to replay
ACC_T_END = 13  # end time of the last interval (microseconds, float)
ACC_SIZE = 14

# series row: one per recorded bucket of updates (float64[SER_SIZE]).
SER_UPDATE = 0
SER_TS = 1
SER_LAMBDA = 2
SER_MU = 3
SER_AUCTIONS = 4
SER_WINS = 5
SER_RESULTS = 6
SER_SPEND = 7
SER_EXPECTED = 8
SER_TARGET = 9
SER_CUM_SPEND = 10
SER_CUM_TARGET = 11
SER_SIZE = 12
SERIES_COLUMNS = ("update", "ts_us", "lambda", "mu", "auctions", "wins", "results", "spend",
                  "expected_spend", "target_spend", "cum_spend", "cum_target")


ACCEL_PER_OCTAVE = 64  # grid cells per factor 2 of w in the shading lookup accelerator
ACCEL_MAX_CELLS = 1 << 16  # per placement; wider tables use ``shade`` itself


@njit(cache=True, nogil=True, inline="always")
def _cell_key(w):
    """A monotone integer key of w > 0: ACCEL_PER_OCTAVE cells per octave (as grid_shade)."""
    m, e = math.frexp(w)  # w = m * 2**e, m in [0.5, 1)
    return e * ACCEL_PER_OCTAVE + int((m - 0.5) * (2 * ACCEL_PER_OCTAVE))


@njit(cache=True, nogil=True)
def build_shade_accel(offsets, knots_w, linear, first_price):
    """A log-spaced grid over each step table's knots: ``idx[start[p] + c]`` = the number of
    knots (absolute position) whose key is below cell c, so a lookup is one ``frexp`` and a
    short scan instead of a binary search with unpredictable branches. Returns
    ``(kmin, ncell, start, idx)``; ``ncell[p] == 0``: no grid (use ``shade``)."""
    p_count = first_price.shape[0]
    kmin = np.zeros(max(p_count, 1), np.int64)
    ncell = np.zeros(max(p_count, 1), np.int64)
    start = np.zeros(max(p_count, 1) + 1, np.int64)
    total = 0
    for p in range(p_count):
        lo = offsets[p]
        hi = offsets[p + 1]
        start[p] = total
        if first_price[p] and not linear[p] and hi > lo and knots_w[lo] > 0.0 \
                and np.isfinite(knots_w[hi - 1]):
            k0 = _cell_key(knots_w[lo])
            k1 = _cell_key(knots_w[hi - 1])
            if k1 - k0 + 1 <= ACCEL_MAX_CELLS:
                kmin[p] = k0
                ncell[p] = k1 - k0 + 1
                total += k1 - k0 + 1
    start[max(p_count, 1)] = total
    idx = np.zeros(max(total, 1), np.int64)
    for p in range(p_count):
        if ncell[p] == 0:
            continue
        lo = offsets[p]
        hi = offsets[p + 1]
        i = lo
        for c in range(ncell[p]):
            while i < hi and _cell_key(knots_w[i]) < kmin[p] + c:
                i += 1
            idx[start[p] + c] = i
    return kmin, ncell, start, idx


@njit(cache=True, nogil=True, inline="always")
def grid_shade(w, p, offsets, knots_w, knots_b, kmin, ncell, start, idx):
    """``shade`` of a step table with a grid (``ncell[p] > 0``) for finite ``w > 0``."""
    lo = offsets[p]
    hi = offsets[p + 1]
    m, e = math.frexp(w)
    c = e * ACCEL_PER_OCTAVE + int((m - 0.5) * (2 * ACCEL_PER_OCTAVE)) - kmin[p]
    if c < 0:
        return w  # below every knot: no knot strictly below w
    if c >= ncell[p]:
        return knots_b[hi - 1]  # above every knot
    i = idx[start[p] + c]  # knots in earlier cells are all < w
    while i < hi and knots_w[i] < w:
        i += 1
    if i == lo:
        return w
    return knots_b[i - 1]


@njit(cache=True, nogil=True)
def shade_fast(w, p, offsets, knots_w, knots_b, linear, tab_fp, kmin, ncell, start, idx):
    """``shade(w, p, ...)`` exactly, with the grid accelerator for step tables. The loop
    inlines this same choice (a call to a separately compiled function costs more than
    the search itself)."""
    if 0 <= p < tab_fp.shape[0] and ncell[p] > 0 and w > 0.0 and w < np.inf:
        return grid_shade(w, p, offsets, knots_w, knots_b, kmin, ncell, start, idx)
    return shade(w, p, offsets, knots_w, knots_b, linear, tab_fp)


@njit(cache=True, nogil=True)
def curve_at(t: float, curve_t: np.ndarray, curve_f: np.ndarray) -> float:
    """Cumulative target share at time t: piecewise linear through the knots, clamped to
    the end values outside them (np.interp semantics, without its per-call overhead)."""
    n = curve_t.shape[0]
    if t <= curve_t[0]:
        return curve_f[0]
    if t >= curve_t[n - 1]:
        return curve_f[n - 1]
    lo = 0
    hi = n - 1
    while hi - lo > 1:  # curve_t[lo] < t < curve_t[hi]
        mid = (lo + hi) >> 1
        if curve_t[mid] <= t:
            lo = mid
        else:
            hi = mid
    x0 = curve_t[lo]
    x1 = curve_t[hi]
    return curve_f[lo] + (curve_f[hi] - curve_f[lo]) * ((t - x0) / (x1 - x0))


@njit(cache=True, nogil=True)
def n_intervals(n, every_n, every_us, flight_start, flight_end):
    """Number of intervals the loop will run (every_n: from the row count)."""
    if every_n > 0:
        return max(1, (n + every_n - 1) // every_n)
    span = max(flight_end - flight_start, 1)
    return max(1, (span + every_us - 1) // every_us)


# No cache=True: numba's cache misses for a function taking another dispatcher, so
# it would only pile up cache files. Compiling costs a few seconds per rule per process.
@njit(nogil=True)
def replay_fused(update, state, params, index, feed_index, ts, value, price, charge_prob,
                 placement, first_price, uniforms, sampled, every_n, every_us, flight_start,
                 flight_end, curve_t, curve_f, budget, norm, expected_auctions, cap,
                 fixed_bid, pbid, shade_on, offsets, knots_w, knots_b, linear, tab_fp,
                 maxlog, ax_kmin, ax_ncell, ax_start, ax_idx, acc, won, pl_acc, series, group,
                 fb, k_begin, k_end):
    """Replay intervals ``k_begin..k_end-1`` in one compiled loop, calling
    ``update(state, params, fb)`` at each boundary; the position (row, time) carries over
    in ``acc`` so the generic path can run one interval per call with a no-op update.

    Intervals: ``every_n > 0``: rows i..i+every_n, ending at the next row's ts (the flight
    end after the last row); else ``[flight_start + k*every_us, +every_us)``. Everything
    per row is written out here rather than in helper functions: a call to a separately
    compiled function with this many arrays costs more than the work of one row.
    """
    n = ts.shape[0]
    for k in range(k_begin, k_end):
        i = int(acc[ACC_POS])
        t_start = float(flight_start) if k == 0 else acc[ACC_T_END]
        lam = state[STATE_LAMBDA]
        mu = state[STATE_MU]
        if every_n > 0:
            j = min(i + every_n, n)
            t_end = float(flight_end) if j >= n else float(ts[j])
        else:
            t_end = min(float(flight_start) + float(k + 1) * float(every_us), float(flight_end))
            j = i + np.searchsorted(ts[i:], np.int64(t_end), "left") if t_end < flight_end else n
        scale = (1.0 + mu * cap) / (max(lam, LAMBDA_FLOOR) + mu)
        spend = 0.0
        expected = 0.0
        results = 0.0
        wins = 0
        cum = acc[ACC_SPEND]
        cum_e = acc[ACC_EXPECTED]
        cum_r = acc[ACC_RESULTS]
        bids = 0
        above = 0
        min_cost = 0.0
        last_ch = acc[ACC_LAST_CHARGE]
        ex_ts = acc[ACC_EXHAUSTED_TS]
        for r in range(i, j):
            if cum >= budget:
                break
            bids += 1
            c = price[r]
            p = placement[r]
            w = pbid[p] if fixed_bid else value[r] * scale
            ml = maxlog[p]
            # Shading never raises a bid above w: rows with w below both the price and the
            # logged maximum can neither win nor extrapolate, so skip the shading call.
            if w >= c or w > ml:
                b = w
                if first_price[r] and shade_on:
                    if ax_ncell[p] > 0 and w > 0.0 and w < np.inf:
                        b = grid_shade(w, p, offsets, knots_w, knots_b, ax_kmin, ax_ncell,
                                       ax_start, ax_idx)
                    else:
                        b = shade(w, p, offsets, knots_w, knots_b, linear, tab_fp)
                    if b > w:
                        b = w
                if b > ml:
                    above += 1
                if b >= c:
                    paid = b if first_price[r] else c
                    if sampled:
                        q = charge_prob[r]
                        ch = paid / q if uniforms[r] < q else 0.0
                    else:
                        ch = paid
                    won[r] = True
                    wins += 1
                    results += value[r]
                    cum_r += value[r]
                    spend += ch
                    cum += ch
                    expected += paid
                    cum_e += paid
                    min_cost += c
                    pl_acc[p, 0] += 1.0
                    pl_acc[p, 1] += value[r]
                    pl_acc[p, 2] += ch
                    pl_acc[p, 3] += paid
                    last_ch = ch
                    if cum >= budget and ex_ts < 0:
                        ex_ts = float(ts[r])
        acc[ACC_LAST_CHARGE] = last_ch
        acc[ACC_EXHAUSTED_TS] = ex_ts
        # F at the interval start is F at the previous end (stored), so one evaluation each.
        f0 = acc[ACC_F_END] if k > 0 else curve_at(t_start, curve_t, curve_f)
        f1 = curve_at(t_end, curve_t, curve_f)
        acc[ACC_F_END] = f1
        target = budget * (f1 - f0)
        acc[ACC_SPEND] = cum
        acc[ACC_EXPECTED] = cum_e
        acc[ACC_RESULTS] = cum_r
        acc[ACC_WINS] += wins
        acc[ACC_BIDS] += bids
        acc[ACC_ABOVE] += above
        acc[ACC_MIN_COST] += min_cost
        acc[ACC_ROWS] += j - i
        acc[ACC_CUM_TARGET] = budget * f1
        fb[FB_K] = k
        fb[FB_AUCTIONS] = j - i
        fb[FB_WINS] = wins
        fb[FB_RESULTS] = results
        fb[FB_SPEND] = spend
        fb[FB_EXPECTED_SPEND] = expected
        fb[FB_TARGET] = target
        fb[FB_CUM_SPEND] = cum
        fb[FB_CUM_EXPECTED] = cum_e
        fb[FB_CUM_TARGET] = budget * f1
        fb[FB_CUM_RESULTS] = cum_r
        fb[FB_REMAINING] = budget - cum
        fb[FB_T_START] = t_start
        fb[FB_T_END] = t_end
        fb[FB_BUDGET] = budget
        fb[FB_REMAINING_SHARE] = 1.0 - f1
        fb[FB_ROWS_SEEN] = acc[ACC_ROWS]
        fb[FB_NORM] = norm if norm > 0.0 else max(target, 1e-300)
        fb[FB_EXHAUSTED] = 1.0 if cum >= budget else 0.0
        fb[FB_EXPECTED_AUCTIONS] = expected_auctions
        acc[ACC_POS] = j
        acc[ACC_T_END] = t_end
        # record(series, k, group, fb, lam, mu), written out (see the docstring)
        row = k // group
        if k % group == 0:
            for col in range(SER_SIZE):
                series[row, col] = 0.0
        series[row, SER_UPDATE] = k
        series[row, SER_TS] = t_end
        series[row, SER_LAMBDA] = lam
        series[row, SER_MU] = mu
        series[row, SER_AUCTIONS] += j - i
        series[row, SER_WINS] += wins
        series[row, SER_RESULTS] += results
        series[row, SER_SPEND] += spend
        series[row, SER_EXPECTED] += expected
        series[row, SER_TARGET] += target
        series[row, SER_CUM_SPEND] = cum
        series[row, SER_CUM_TARGET] = budget * f1
        if feed_index:
            ftl_insert(index, value[i:j], price[i:j])
        update(state, params, fb)
        if feed_index and not np.isnan(state[STATE_QUERY]):
            state[STATE_LAMBDA] = ftl_lambda_for_spend(index, state[STATE_QUERY])
    return k_end


@njit(cache=True, nogil=True)
def no_update(state, params, fb):
    """The update of the generic path's compiled part (the Python update runs after)."""
    return
