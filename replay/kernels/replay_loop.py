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

``fused_loop(update)`` is ONE compiled loop with the rule's ``@njit`` update inlined at
every boundary (compiled once per update function and process). The engine's generic path
(a rule with a Python ``update``) runs the same loop one interval per call with the no-op
``no_update`` and calls the Python update in between, so both paths share every line.

Wins: with ``win_thresholds`` (step tables, the default empirical landscape) a row is won
iff ``w >= need[row]``, the smallest budget-adjusted value whose shaded bid reaches the
row's price, so only won first-price rows are shaded; otherwise every row that could win is
shaded. Both decide exactly the same wins (a test compares them).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from replay.kernels.bits import f64_bits
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
ACC_CURVE_POS = 14  # segment of the target curve holding the last interval end
ACC_SIZE = 15

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


_KEY_SHIFT = 52 - 6  # exponent and the top 6 mantissa bits: ACCEL_PER_OCTAVE = 2**6 cells


@njit(cache=True, nogil=True, inline="always")
def _cell_key(w):
    """A monotone integer key of w >= 0: ACCEL_PER_OCTAVE cells per octave (the top bits of
    the double; for w > 0 the bit pattern orders like the value)."""
    return f64_bits(w) >> _KEY_SHIFT


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
    c = (f64_bits(w) >> _KEY_SHIFT) - kmin[p]
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
def win_thresholds(price, placement, first_price, shade_on, offsets, knots_w, knots_b, linear,
                   tab_fp, maxlog):
    """Per row, the smallest budget-adjusted value ``w`` (currency per impression) whose
    bid wins it, and per placement the ``w`` above which the bid exceeds the largest
    logged price; ``(ok, need, above_w)``.

    The shaded bid ``b(w)`` of a step table is nondecreasing in ``w`` (the knots' bids
    ascend), so ``b(w) >= c`` iff ``w >= need`` and ``b(w) > maxlog`` iff ``w > above_w``:
    the loop then decides a row with one multiply and two compares and shades only rows it
    wins, with exactly the decisions of shading every row. ``ok`` is False (use the
    per-row shading loop) for linear (log-normal) tables or a placement whose rows mix
    pricing rules.
    """
    n = price.shape[0]
    p_count = maxlog.shape[0]
    need = np.empty(n, np.float64)
    above_w = maxlog.copy()
    seen_fp = np.zeros(p_count, np.bool_)
    seen_sp = np.zeros(p_count, np.bool_)
    for r in range(n):
        p = placement[r]
        if first_price[r]:
            seen_fp[p] = True
        else:
            seen_sp[p] = True
    shaded = np.zeros(p_count, np.bool_)
    for p in range(p_count):
        if seen_fp[p] and seen_sp[p]:
            return False, need, above_w
        if seen_fp[p] and shade_on and p < tab_fp.shape[0] and tab_fp[p] \
                and offsets[p + 1] > offsets[p]:
            if linear[p]:
                return False, need, above_w
            shaded[p] = True
            lo = offsets[p]
            hi = offsets[p + 1]
            ml = maxlog[p]
            if not (ml >= knots_w[lo]):
                above_w[p] = ml  # b = w up to the first knot, then b >= knots_w[lo] > ml
            else:
                a = np.inf
                for h in range(lo, hi):
                    if knots_b[h] > ml:
                        a = knots_w[h]
                        break
                above_w[p] = a
    for r in range(n):
        c = price[r]
        p = placement[r]
        if not shaded[p]:
            need[r] = c  # bid w: wins iff w >= c
            continue
        lo = offsets[p]
        hi = offsets[p + 1]
        if c <= knots_w[lo]:
            need[r] = c  # b = w below the first knot and b >= knots_w[lo] above it
            continue
        # first knot h whose bid reaches c; the bid is knots_b[h] once w > knots_w[h]
        a = lo
        b = hi
        while a < b:
            mid = (a + b) >> 1
            if knots_b[mid] < c:
                a = mid + 1
            else:
                b = mid
        need[r] = np.nextafter(knots_w[a], np.inf) if a < hi else np.inf
    return True, need, above_w


@njit(cache=True, nogil=True, inline="always")
def _curve_from(t, curve_t, curve_f, pos):
    """``curve_at(t)`` (bit for bit) searching forward from segment ``pos`` (times only
    grow across intervals); returns ``(share, segment)``."""
    n = curve_t.shape[0]
    if t <= curve_t[0]:
        return curve_f[0], pos
    if t >= curve_t[n - 1]:
        return curve_f[n - 1], pos
    lo = pos
    while curve_t[lo + 1] <= t:
        lo += 1
    x0 = curve_t[lo]
    x1 = curve_t[lo + 1]
    return curve_f[lo] + (curve_f[lo + 1] - curve_f[lo]) * ((t - x0) / (x1 - x0)), lo


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


_FUSED: dict[object, object] = {}


def fused_loop(update):
    """The replay loop compiled with ``update`` (an ``@njit`` function
    ``update(state, params, fb)``) inlined at each boundary; built once per update
    function and process.

    Inlining matters: a call to a separately compiled function passing three arrays costs
    more (reference counting) than a per-request rule's whole update. No cache=True:
    numba cannot cache a closure over another function, so compiling costs a few seconds
    per rule per process.
    """
    loop = _FUSED.get(update)
    if loop is None:
        loop = _make_fused(update)
        _FUSED[update] = loop
    return loop


def replay_fused(update, *args):
    """``fused_loop(update)(*args)``: see ``_make_fused`` for the arguments."""
    return fused_loop(update)(*args)


def _make_fused(update_inline):
    @njit(nogil=True)
    def replay_fused_loop(state, params, index, feed_index, ts, value, price, charge_prob,
                     placement, first_price, uniforms, sampled, every_n, every_us, flight_start,
                     flight_end, curve_t, curve_f, budget, norm, expected_auctions, cap,
                     fixed_bid, pbid, shade_on, offsets, knots_w, knots_b, linear, tab_fp,
                     maxlog, ax_kmin, ax_ncell, ax_start, ax_idx, fast, need, above_w, acc, won,
                     pl_acc, series, group, fb, k_begin, k_end):
        """Replay intervals ``k_begin..k_end-1`` in one compiled loop, calling
        ``update(state, params, fb)`` at each boundary; the position (row, time) carries over
        in ``acc`` so the generic path can run one interval per call with a no-op update.

        Intervals: ``every_n > 0``: rows i..i+every_n, ending at the next row's ts (the flight
        end after the last row); else ``[flight_start + k*every_us, +every_us)``. ``fast``:
        ``need``/``above_w`` from ``win_thresholds`` decide wins without shading every row
        (same decisions); else every row that could win is shaded. Everything per row is
        written out here rather than in helper functions: a call to a separately compiled
        function with this many arrays costs more than the work of one row.
        """
        n = ts.shape[0]
        srow = k_begin // group  # series row and position in its bucket (no division per k)
        spos = k_begin - srow * group
        # The running totals live in locals and go back to ``acc`` when the call ends (the
        # update sees only ``fb``): per-request schedules pay little per interval.
        cpos = int(acc[ACC_CURVE_POS])
        i = int(acc[ACC_POS])
        t_prev = acc[ACC_T_END]
        f_prev = acc[ACC_F_END]
        cum = acc[ACC_SPEND]
        cum_e = acc[ACC_EXPECTED]
        cum_r = acc[ACC_RESULTS]
        last_ch = acc[ACC_LAST_CHARGE]
        ex_ts = acc[ACC_EXHAUSTED_TS]
        tot_wins = acc[ACC_WINS]
        tot_bids = acc[ACC_BIDS]
        tot_above = acc[ACC_ABOVE]
        tot_min_cost = acc[ACC_MIN_COST]
        rows_seen = acc[ACC_ROWS]
        # Bucket sums of the current series row (resumed when a call starts mid-bucket).
        s_auctions = series[srow, SER_AUCTIONS] if spos > 0 else 0.0
        s_wins = series[srow, SER_WINS] if spos > 0 else 0.0
        s_results = series[srow, SER_RESULTS] if spos > 0 else 0.0
        s_spend = series[srow, SER_SPEND] if spos > 0 else 0.0
        s_expected = series[srow, SER_EXPECTED] if spos > 0 else 0.0
        s_target = series[srow, SER_TARGET] if spos > 0 else 0.0
        fb[FB_BUDGET] = budget
        fb[FB_EXPECTED_AUCTIONS] = expected_auctions
        for k in range(k_begin, k_end):
            t_start = float(flight_start) if k == 0 else t_prev
            lam = state[STATE_LAMBDA]
            mu = state[STATE_MU]
            if every_n > 0:
                j = min(i + every_n, n)
                t_end = float(flight_end) if j >= n else float(ts[j])
            else:
                t_end = min(float(flight_start) + float(k + 1) * float(every_us),
                            float(flight_end))
                j = i + np.searchsorted(ts[i:], np.int64(t_end), "left") \
                    if t_end < flight_end else n
            scale = (1.0 + mu * cap) / (max(lam, LAMBDA_FLOOR) + mu)
            spend = 0.0
            expected = 0.0
            results = 0.0
            wins = 0
            bids = 0
            above = 0
            min_cost = 0.0
            if fast:
                if cum < budget:
                    bids = j - i
                    for r in range(i, j):
                        p = placement[r]
                        w = pbid[p] if fixed_bid else value[r] * scale
                        if w > above_w[p]:
                            above += 1
                        if w >= need[r]:
                            c = price[r]
                            if first_price[r]:
                                b = w
                                if shade_on:
                                    if ax_ncell[p] > 0 and w > 0.0 and w < np.inf:
                                        # grid_shade, written out: numba's call costs as much
                                        # as the lookup itself
                                        lo = offsets[p]
                                        hi = offsets[p + 1]
                                        cell = (f64_bits(w) >> _KEY_SHIFT) - ax_kmin[p]
                                        if cell >= ax_ncell[p]:
                                            b = knots_b[hi - 1]
                                        elif cell >= 0:
                                            h = ax_idx[ax_start[p] + cell]
                                            while h < hi and knots_w[h] < w:
                                                h += 1
                                            if h > lo:
                                                b = knots_b[h - 1]
                                    else:
                                        b = shade(w, p, offsets, knots_w, knots_b, linear, tab_fp)
                                    if b > w:
                                        b = w
                                paid = b
                            else:
                                paid = c
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
                            if cum >= budget:
                                bids = r - i + 1
                                if ex_ts < 0:
                                    ex_ts = float(ts[r])
                                break
            else:
                for r in range(i, j):
                    if cum >= budget:
                        break
                    bids += 1
                    c = price[r]
                    p = placement[r]
                    w = pbid[p] if fixed_bid else value[r] * scale
                    ml = maxlog[p]
                    # Shading never raises a bid above w: rows with w below both the price and
                    # the logged maximum can neither win nor extrapolate, so skip shading them.
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
            # F at the interval start is F at the previous end, so one evaluation each.
            if k > 0:
                f0 = f_prev
            else:
                f0, cpos = _curve_from(t_start, curve_t, curve_f, cpos)
            f1, cpos = _curve_from(t_end, curve_t, curve_f, cpos)
            f_prev = f1
            target = budget * (f1 - f0)
            tot_wins += wins
            tot_bids += bids
            tot_above += above
            tot_min_cost += min_cost
            rows_seen += j - i
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
            fb[FB_REMAINING_SHARE] = 1.0 - f1
            fb[FB_ROWS_SEEN] = rows_seen
            fb[FB_NORM] = norm if norm > 0.0 else max(target, 1e-300)
            fb[FB_EXHAUSTED] = 1.0 if cum >= budget else 0.0
            # the series: one row per bucket of ``group`` updates (``update`` = the last)
            s_auctions += j - i
            s_wins += wins
            s_results += results
            s_spend += spend
            s_expected += expected
            s_target += target
            spos += 1
            if spos == group or k == k_end - 1:
                series[srow, SER_UPDATE] = k
                series[srow, SER_TS] = t_end
                series[srow, SER_LAMBDA] = lam
                series[srow, SER_MU] = mu
                series[srow, SER_AUCTIONS] = s_auctions
                series[srow, SER_WINS] = s_wins
                series[srow, SER_RESULTS] = s_results
                series[srow, SER_SPEND] = s_spend
                series[srow, SER_EXPECTED] = s_expected
                series[srow, SER_TARGET] = s_target
                series[srow, SER_CUM_SPEND] = cum
                series[srow, SER_CUM_TARGET] = budget * f1
            if spos == group:
                spos = 0
                srow += 1
                s_auctions = 0.0
                s_wins = 0.0
                s_results = 0.0
                s_spend = 0.0
                s_expected = 0.0
                s_target = 0.0
            if feed_index:
                ftl_insert(index, value[i:j], price[i:j])
            i = j
            t_prev = t_end
            update_inline(state, params, fb)
            if feed_index and not np.isnan(state[STATE_QUERY]):
                state[STATE_LAMBDA] = ftl_lambda_for_spend(index, state[STATE_QUERY])
        acc[ACC_POS] = i
        acc[ACC_T_END] = t_prev
        acc[ACC_F_END] = f_prev
        acc[ACC_SPEND] = cum
        acc[ACC_EXPECTED] = cum_e
        acc[ACC_RESULTS] = cum_r
        acc[ACC_LAST_CHARGE] = last_ch
        acc[ACC_EXHAUSTED_TS] = ex_ts
        acc[ACC_WINS] = tot_wins
        acc[ACC_BIDS] = tot_bids
        acc[ACC_ABOVE] = tot_above
        acc[ACC_MIN_COST] = tot_min_cost
        acc[ACC_ROWS] = rows_seen
        acc[ACC_CUM_TARGET] = budget * f_prev
        acc[ACC_CURVE_POS] = cpos
        return k_end

    return replay_fused_loop


@njit(cache=True, nogil=True)
def no_update(state, params, fb):
    """The update of the generic path's compiled part (the Python update runs after)."""
    return
