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
every boundary: ``replay_fused_loop`` below, built per update function from a generated copy
of its source and cached on disk (``replay.kernels._fused_build``), so a process loads it
instead of compiling it again. The engine's generic path (a rule with a Python ``update``)
runs this module's own build, whose update is the no-op ``no_update``, one interval per
call, reads ``fb`` and calls the Python update in between.

Every request (``every_n == 1``, a numba update, win thresholds, series buckets of several
updates): the build ``fused_loop(update, one_row=True)`` runs the rows between
series-bucket ends in a "per-request stretch", one row per update with a jump on the win
and no chunk machinery, and hands the update its feedback as a tuple
(``feedback_tuple``, indexed by the same ``FB_*``: fields it does not read cost nothing,
the ones it reads need no store and reload). The bucket's last row, the call's last and
the replay's last go through the interval body, which fills ``fb``. The stretch does what
the body does for a one-row interval, bit for bit (tests compare it with the generic path,
which never enters it). It is its own build because its code, even unused, slowed the
batch passes by about 8 %.

Per request, each row's bid waits on the update after the row before, and half the wins
are mispredicted, so the stretch shortens what a row waits on after a misprediction:
* with the cap multiplier at 0 a row is won iff ``lambda <= theta[r]`` (``win_lambdas``,
  once per campaign: the exact boundary of ``value * (1 / max(lambda, floor)) >= need``),
  one compare after lambda instead of a division and a product;
* the target shares of up to ``WIN_CHUNK`` rows are computed before those rows
  (``_curve_shares``, a loop LLVM vectorizes), so an update reads its target from memory.
Together about 21 % less time per row for ``dual-gradient`` (interleaved runs).

Wins: with ``win_thresholds`` (step tables, the default empirical landscape) a row is won
iff ``w >= need[row]``, the smallest budget-adjusted value whose shaded bid reaches the
row's price, so only won first-price rows are shaded; otherwise every row that could win is
shaded. Both decide exactly the same wins (a test compares them).

The fast path (thresholds) takes an interval in chunks of ``WIN_CHUNK`` rows and three
passes: list the won rows without a jump on the win (``cand[m] = r; m += won``), shade the
won first-price rows, then add up the won rows in row order. The sums add in the same order
as the per-row loop, so both return bit-identical totals. Rows are indexed by ``uint64``
there: numba adds a negative-index fix-up to every load through a signed index.

Shading a step table reads one record of a log-spaced grid (``build_shade_accel``,
``grid_lookup``): one compare picks the bid on either side of the cell's first knot. Values
are chosen with ``bits.pick`` and ``bits.UNIT``/``bits.MASK`` loaded from memory, not with
``a if cond else b``: LLVM lowers a select of doubles to a jump on x86, and a jump on a
coin flip (which side of a knot, whether a sampled charge happens) is mispredicted half
the time.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from replay.kernels.bits import bits_f64, f64_bits, pick
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


#: Rows per chunk of the fast path's three passes (its lists of won rows stay in L1).
WIN_CHUNK = 1024

ACCEL_PER_OCTAVE = 128  # grid cells per factor 2 of w in the shading lookup accelerator
ACCEL_MAX_CELLS = 1 << 16  # per placement; wider tables use ``shade`` itself

# Columns of the accelerator's per-placement int64 table ``grid``.
G_KMIN = 0  # key of the smallest positive knot
G_NCELL = 1  # cells (0: no grid; one record that shades to w)
G_START = 2  # row of the placement's first cell in ``rec``
G_HI = 3  # offsets[p + 1]: one past the placement's last knot
G_SLOW = 4  # 1: a first-price table the grid cannot serve (linear, or too wide): ``shade``
G_SIZE = 5

# Columns of a cell record ``rec[cell]``: the first knot at or after the cell's start and
# the bids on either side of it, so one compare decides the bid.
R_KNOT = 0
R_BID_BELOW = 1  # bid for w <= knot (+inf: no knot below w, the bid is w)
R_BID_ABOVE = 2  # bid for knot < w <= next knot
R_NEXT = 3  # the knot after it (w above it: scan on from there; rare)
R_SIZE = 4

_U = np.uint64  # an index type numba does not wrap (see the fast loop)
_KEY_SHIFT = 52 - 7  # exponent and the top 7 mantissa bits: ACCEL_PER_OCTAVE = 2**7 cells


@njit(cache=True, nogil=True, inline="always")
def _cell_key(w):
    """A monotone integer key of w >= 0: ACCEL_PER_OCTAVE cells per octave (the top bits of
    the double; for w > 0 the bit pattern orders like the value)."""
    return f64_bits(w) >> _KEY_SHIFT


@njit(cache=True, nogil=True)
def build_shade_accel(offsets, knots_w, knots_b, linear, first_price):
    """A log-spaced grid of cell records over each first-price step table's positive finite
    knots, so shading is a shift, one record read and one compare instead of a search.

    Returns ``(grid, rec, gidx)``: ``grid[p, G_*]`` per placement; ``rec[start + c, R_*]``
    for cell c and one more record per placement after its last cell (every knot up to the
    last finite one lies below such w); ``gidx[start + c]``: the absolute position of the
    record's knot. Placements without a grid (second price, empty) have one record that
    shades to w.
    """
    p_count = first_price.shape[0]
    grid = np.zeros((max(p_count, 1), G_SIZE), np.int64)
    total = 0
    for p in range(p_count):
        lo = offsets[p]
        hi = offsets[p + 1]
        grid[p, G_START] = total
        grid[p, G_HI] = hi
        if first_price[p] and hi > lo:
            a = lo  # first positive knot (zero prices give zero knots)
            while a < hi and not (knots_w[a] > 0.0):
                a += 1
            z = hi  # one past the last finite knot
            while z > a and not (knots_w[z - 1] < np.inf):
                z -= 1
            if linear[p] or a >= z \
                    or _cell_key(knots_w[z - 1]) - _cell_key(knots_w[a]) + 1 > ACCEL_MAX_CELLS:
                grid[p, G_SLOW] = 1
            else:
                grid[p, G_KMIN] = _cell_key(knots_w[a])
                grid[p, G_NCELL] = _cell_key(knots_w[z - 1]) - grid[p, G_KMIN] + 1
        total += grid[p, G_NCELL] + 1
    rec = np.full((max(total, 1), R_SIZE), np.inf)
    gidx = np.zeros(max(total, 1), np.int64)
    for p in range(p_count):
        lo = offsets[p]
        hi = offsets[p + 1]
        s = grid[p, G_START]
        if grid[p, G_NCELL] == 0:
            gidx[s] = lo
            continue
        kmin = grid[p, G_KMIN]
        h = lo
        for c in range(grid[p, G_NCELL] + 1):
            while h < hi and _cell_key(knots_w[h]) < kmin + c:
                h += 1  # knots before h lie in earlier cells: below every w of cell c
            gidx[s + c] = h
            if h > lo:
                rec[s + c, R_BID_BELOW] = knots_b[h - 1]
            if h < hi:
                rec[s + c, R_KNOT] = knots_w[h]
                rec[s + c, R_BID_ABOVE] = knots_b[h]
            if h + 1 < hi:
                rec[s + c, R_NEXT] = knots_w[h + 1]
    return grid, rec, gidx


@njit(cache=True, nogil=True, inline="always")
def grid_lookup(w, p, grid, rec, mask):
    """``(bid, cell)``: the shaded bid for ``w >= 0`` from the record of w's cell, without a
    branch (``mask`` = ``bits.MASK``), on a placement with ``grid[p, G_SLOW] == 0``. Exact
    unless ``w > rec[cell, R_NEXT]`` (a second knot of the cell lies below w, rare): the
    caller then scans on from knot ``gidx[cell] + 2`` (see ``shade_fast``).

    A row's shaded bid matters only if the row is won, a coin flip the CPU cannot predict:
    computing it for every row without branches costs less than a mispredicted jump. The
    cell of w is clamped to the grid: below it only zero knots lie under w, above it only
    infinite ones. The rare scan is left to the caller because numba wraps an inlined
    function that branches over arrays in reference counting on every call.
    """
    cell = (f64_bits(w) >> _KEY_SHIFT) - grid[p, G_KMIN]
    cell = _U(min(max(cell, 0), grid[p, G_NCELL]) + grid[p, G_START])
    b = pick(mask[np.int64(w > rec[cell, R_KNOT])], rec[cell, R_BID_ABOVE],
             rec[cell, R_BID_BELOW])
    return b, cell


@njit(cache=True, nogil=True)
def shade_fast(w, p, offsets, knots_w, knots_b, linear, tab_fp, grid, rec, gidx, mask):
    """``min(shade(w, p, ...), w)`` exactly (for ``w >= 0``), through the grid where the
    placement has one. The per-row loop calls it; the fast loop writes out this same
    sequence (a call there costs more than the lookup: see ``grid_lookup``)."""
    if 0 <= p < tab_fp.shape[0] and grid[p, G_SLOW] == 0:
        b, cell = grid_lookup(w, p, grid, rec, mask)
        if w > rec[cell, R_NEXT]:
            h = gidx[cell] + 2
            while h < grid[p, G_HI] and knots_w[h] < w:
                h += 1
            b = knots_b[h - 1]
        return pick(mask[np.int64(b < w)], b, w)
    b = shade(w, p, offsets, knots_w, knots_b, linear, tab_fp)
    return b if b < w else w


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
def _wins_at(v, nd, lam):
    """The loop's win test with ``mu == 0``: ``v * (1 / max(lam, floor)) >= nd``."""
    return v * (1.0 / max(lam, LAMBDA_FLOOR)) >= nd


_TOP = np.finfo(np.float64).max
_NEAR = 2  # win_lambdas' first pass looks this many floats either side of value / need


@njit(cache=True, nogil=True, error_model="numpy")
def _win_lambda_search(v, nd):
    """``win_lambdas`` of one row by search over bit patterns (they order like positive
    floats): from ``v / nd``, steps doubling until the test changes, then bisection."""
    if not _wins_at(v, nd, LAMBDA_FLOOR):
        return -np.inf
    if _wins_at(v, nd, np.inf):
        return np.inf
    if _wins_at(v, nd, _TOP):
        return _TOP
    # The test holds at the floor and fails at the top: the last bits that win.
    t = min(max(v / nd, LAMBDA_FLOOR), _TOP) if nd > 0.0 else _TOP
    lo = f64_bits(LAMBDA_FLOOR)
    hi = f64_bits(_TOP)
    step = 1
    if _wins_at(v, nd, t):
        lo = f64_bits(t)
        while lo + step < hi:
            if not _wins_at(v, nd, bits_f64(lo + step)):
                hi = lo + step
                break
            lo += step
            step *= 2
    else:
        hi = f64_bits(t)
        while hi - step > lo:
            if _wins_at(v, nd, bits_f64(hi - step)):
                lo = hi - step
                break
            hi -= step
            step *= 2
    while hi - lo > 1:
        mid = lo + (hi - lo) // 2
        if _wins_at(v, nd, bits_f64(mid)):
            lo = mid
        else:
            hi = mid
    return bits_f64(lo)


@njit(cache=True, nogil=True, error_model="numpy")  # v / 0 is inf, not an exception
def win_lambdas(value, need):
    """Per row, the largest multiplier lambda (results per currency) at which the loop wins
    it while the cap multiplier is zero: row r is won iff ``lambda <= theta[r]``, for every
    float lambda, bit for bit the same decision as ``value * scale >= need``. Needs
    ``value >= 0`` and ``need >= 0``.

    The test ``value * (1 / max(lambda, floor)) >= need`` only weakens as lambda grows
    (correctly rounded division and product are monotone), so it holds on ``lambda <= theta``
    and nowhere else. ``theta`` lies within two floats of ``value / need`` in all but rare
    rows (a first pass without branches checks the test at those five floats); the rest, and
    the ratios outside [floor, max float], go through ``_win_lambda_search``. ``-inf``:
    never won; ``+inf``: won at any lambda. The per-request stretch compares lambda with
    ``theta[r]`` instead of dividing first: the decision then waits on one compare, not on
    a division.
    """
    n = value.shape[0]
    theta = np.empty(n, np.float64)
    for r in range(n):
        v = value[r]
        nd = need[r]
        t = min(max(v / nd, LAMBDA_FLOOR), _TOP)
        bits = f64_bits(t) - _NEAR
        wins = 0
        for d in range(2 * _NEAR + 1):  # the test at the 2 * _NEAR + 1 floats around t
            wins += _wins_at(v, nd, bits_f64(bits + d))
        # The test changes inside the window iff it holds at its first float and fails at
        # its last; theta is then the last float that wins.
        inside = (wins > 0) & (wins <= 2 * _NEAR) & (t > LAMBDA_FLOOR) & (t < NO_BID_LAMBDA)
        theta[r] = pick(-np.int64(inside), bits_f64(bits + wins - 1), np.nan)
    for r in range(n):
        if np.isnan(theta[r]):
            theta[r] = _win_lambda_search(value[r], need[r])
    return theta


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
def _curve_shares(ts, start, count, curve_t, curve_f, pos, out, out_pos):
    """``out[u], out_pos[u] = _curve_from(float(ts[start + u]), ..., pos)`` for
    ``u < count``, the positions carried from row to row, bit for bit; returns the last
    position. The rows of one segment go through a loop without branches, which LLVM
    vectorizes (about 5x faster than ``_curve_from`` row by row)."""
    n_knots = curve_t.shape[0]
    u = 0
    while u < count:
        t = float(ts[start + u])
        if t <= curve_t[0]:
            out[u] = curve_f[0]
            out_pos[u] = pos
            u += 1
            continue
        if t >= curve_t[n_knots - 1]:
            out[u] = curve_f[n_knots - 1]
            out_pos[u] = pos
            u += 1
            continue
        while curve_t[pos + 1] <= t:
            pos += 1
        x0 = curve_t[pos]
        x1 = curve_t[pos + 1]
        f0 = curve_f[pos]
        df = curve_f[pos + 1] - f0
        dx = x1 - x0
        # Times grow: the rows before the segment's end share its formula. Most chunks
        # lie in one segment; else a binary search finds the first row at or after x1.
        v = count
        if not (float(ts[start + count - 1]) < x1):
            lo = u  # float(ts[start + lo]) < x1 <= float(ts[start + v])
            v = count - 1
            while v - lo > 1:
                mid = (lo + v) >> 1
                if float(ts[start + mid]) < x1:
                    lo = mid
                else:
                    v = mid
        for q in range(u, v):
            out[q] = f0 + df * ((float(ts[start + q]) - x0) / dx)
        for q in range(u, v):
            out_pos[q] = pos
        u = v
    return pos


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


@njit(cache=True, nogil=True, inline="always")
def feedback_tuple(k, auctions, wins, results, spend, expected, target, cum, cum_e, cum_target,
                   cum_r, remaining, t_start, t_end, budget, remaining_share, rows_seen, norm,
                   exhausted, expected_auctions):
    """The feedback of one interval as a tuple of ``FB_SIZE`` floats in ``FB_*`` order.

    The per-request stretch hands the update this tuple rather than the ``fb`` array: a
    tuple lives in registers, so fields the update never reads are never computed and the
    ones it reads need no store and reload (an array is memory every other store may
    alias)."""
    return (float(k), float(auctions), float(wins), float(results), float(spend),
            float(expected), float(target), float(cum), float(cum_e), float(cum_target),
            float(cum_r), float(remaining), float(t_start), float(t_end), float(budget),
            float(remaining_share), float(rows_seen), float(norm), float(exhausted),
            float(expected_auctions))


@njit(cache=True, nogil=True)
def no_update(state, params, fb):
    """The update of the generic path's compiled part (the Python update runs after)."""
    return


# ``replay_fused_loop`` calls ``update_inline`` at each boundary and tests ``ONE_ROW``:
# module globals, which numba compiles in as constants. The build in this module is the
# generic path's (no-op update, no stretch); ``fused_loop`` makes the others from a
# generated copy of the loop that rebinds both names (``replay.kernels._fused_build``).
update_inline = no_update
ONE_ROW = False


@njit(cache=True, nogil=True)
def replay_fused_loop(state, params, index, feed_index, ts, value, price, charge_prob,
                      placement, first_price, uniforms, sampled, every_n, every_us,
                      flight_start, flight_end, curve_t, curve_f, budget, norm,
                      expected_auctions, cap, fixed_bid, pbid, shade_on, offsets, knots_w,
                      knots_b, linear, tab_fp, maxlog, grid, rec, gidx, unit, mask, fast, need,
                      above_w, theta, acc, won, pl_acc, series, group, fb, k_begin, k_end):
    """Replay intervals ``k_begin..k_end-1`` in one compiled loop, calling
    ``update(state, params, fb)`` at each boundary (``feedback_tuple(...)`` in the
    per-request stretch); the position (row, time) carries over in ``acc`` and the last
    feedback is left in ``fb``, so the generic path can run one interval per call with a
    no-op update.

    Intervals: ``every_n > 0``: rows i..i+every_n, ending at the next row's ts (the flight
    end after the last row); else ``[flight_start + k*every_us, +every_us)``. ``fast``:
    ``need``/``above_w`` from ``win_thresholds`` decide wins without shading every row
    (same decisions); else every row that could win is shaded. Everything per row is
    written out here rather than in helper functions: a call to a separately compiled
    function with this many arrays costs more than the work of one row.
    """
    n = ts.shape[0]
    cand = np.empty(WIN_CHUNK, np.int64)  # pass 1's won rows of a chunk
    cand_fp = np.empty(WIN_CHUNK, np.int64)  # those of them to shade
    paid_buf = np.empty(WIN_CHUNK, np.float64)  # price paid per row of the chunk if won
    f_buf = np.empty(WIN_CHUNK, np.float64)  # per-request stretch: target curve share
    tgt_buf = np.empty(WIN_CHUNK, np.float64)  # and target spend per row, and
    pos_buf = np.empty(WIN_CHUNK, np.int64)  # the curve segment after each row
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
    # One row per update, the rule's own numba update, win thresholds: the per-request
    # stretch below runs such rows without the chunk machinery.
    stretch = every_n == 1 and fast and not feed_index
    use_theta = theta.shape[0] == n and not fixed_bid
    k = k_begin
    while k < k_end:
        # ``ONE_ROW`` first: a constant of the build, so numba drops the block (its
        # typing and compile time) from the other build
        if ONE_ROW and stretch and k > 0 and cum < budget and spos < group - 1 \
                and k + 1 < k_end and i + 1 < n:
            # Rows k..k_stop-1, one per interval: stops before the last row of the
            # series bucket, of the call and of the replay (the interval body below
            # writes those) or after the row that spends the budget. Everything here
            # is what the body below does for an interval of one row, bit for bit; a
            # test compares it with the generic path, which never takes this branch.
            k_stop = min(k_end - 1, k + (group - 1 - spos), n - 1 - i + k)
            while k < k_stop:
                # Pass 0: the target shares of a chunk of rows, before the rows. They do
                # not depend on the bids, and after a mispredicted win the next update
                # then waits on a load, not on the curve's division.
                k_chunk = min(k_stop, k + WIN_CHUNK)
                n_chunk = k_chunk - k
                cpos = _curve_shares(ts, i + 1, n_chunk, curve_t, curve_f, cpos, f_buf,
                                     pos_buf)
                tgt_buf[0] = budget * (f_buf[0] - f_prev)
                for u in range(1, n_chunk):
                    tgt_buf[u] = budget * (f_buf[u] - f_buf[u - 1])
                u = 0
                while k < k_chunk:
                    r = _U(i)
                    lam = state[STATE_LAMBDA]
                    mu = state[STATE_MU]
                    scale = (1.0 + mu * cap) / (max(lam, LAMBDA_FLOOR) + mu)
                    p = _U(placement[r])
                    w = pbid[p] if fixed_bid else value[r] * scale
                    above = np.int64(w > above_w[p])
                    spend = 0.0
                    expected = 0.0
                    results = 0.0
                    wins = 0
                    min_cost = 0.0
                    # A jump: the CPU runs ahead of the win (see DEVELOPERS). With mu = 0 the
                    # win is ``lam <= theta[r]`` (``win_lambdas``): the same decision, known
                    # one compare after lambda instead of after a division.
                    if (lam <= theta[r]) if use_theta and mu == 0.0 else (w >= need[r]):
                        c = price[r]
                        paid = c
                        if first_price[r]:
                            b = w
                            if not shade_on:
                                pass
                            elif grid[p, G_SLOW]:
                                b = shade(w, np.int64(p), offsets, knots_w, knots_b, linear,
                                          tab_fp)
                                if b > w:
                                    b = w
                            else:  # as in pass 2 below
                                b, cell = grid_lookup(w, p, grid, rec, mask)
                                if w > rec[cell, R_NEXT]:
                                    h = gidx[cell] + 2
                                    while h < grid[p, G_HI] and knots_w[h] < w:
                                        h += 1
                                    b = knots_b[h - 1]
                                b = pick(mask[np.int64(b < w)], b, w)
                            paid = b
                        if sampled:
                            q = charge_prob[r]
                            ch = (paid / q) * unit[np.int64(uniforms[r] < q)]
                        else:
                            ch = paid
                        won[r] = True
                        wins = 1
                        results = value[r]
                        cum_r += value[r]
                        spend = ch
                        cum += ch
                        expected = paid
                        cum_e += paid
                        min_cost = c
                        pl_acc[p, 0] += 1.0
                        pl_acc[p, 1] += value[r]
                        pl_acc[p, 2] += ch
                        pl_acc[p, 3] += paid
                        last_ch = ch
                        if cum >= budget and ex_ts < 0:
                            ex_ts = float(ts[r])
                    t_end = float(ts[i + 1])
                    f1 = f_buf[u]
                    target = tgt_buf[u]
                    tot_wins += wins
                    tot_bids += 1
                    tot_above += above
                    tot_min_cost += min_cost
                    rows_seen += 1
                    s_auctions += 1
                    s_wins += wins
                    s_results += results
                    s_spend += spend
                    s_expected += expected
                    s_target += target
                    spos += 1
                    fbt = feedback_tuple(k, 1, wins, results, spend, expected, target, cum,
                                         cum_e, budget * f1, cum_r, budget - cum, t_prev, t_end,
                                         budget, 1.0 - f1, rows_seen,
                                         norm if norm > 0.0 else max(target, 1e-300),
                                         1.0 if cum >= budget else 0.0, expected_auctions)
                    f_prev = f1
                    i += 1
                    t_prev = t_end
                    update_inline(state, params, fbt)
                    k += 1
                    u += 1
                    if cum >= budget:
                        break
                cpos = pos_buf[u - 1]  # pass 0 may have run past a row that spent the budget
                if cum >= budget:
                    break
            continue
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
        if fast and cum < budget:
            # Rows are indexed by unsigned integers here: numba wraps every signed
            # index in a negative-index fix-up (about 4 instructions a load).
            bids = j - i
            r0 = i
            while r0 < j:
                r1 = min(r0 + WIN_CHUNK, j)
                base = _U(r0)
                # Pass 1: the won rows of the chunk, listed without a jump on the win
                # (a coin flip the CPU would mispredict half the time).
                m = _U(0)
                m_fp = _U(0)
                for r in range(base, _U(r1)):
                    p = _U(placement[r])
                    w = pbid[p] if fixed_bid else value[r] * scale
                    above += w > above_w[p]
                    hit = w >= need[r]
                    cand[m] = r
                    m += _U(hit)
                    cand_fp[m_fp] = r
                    m_fp += _U(hit & first_price[r])
                    paid_buf[r - base] = price[r]
                # Pass 2: the price of each won first-price row is its (shaded) bid, in
                # a loop of independent lookups: no running sum waits on them.
                for t in range(m_fp):
                    r = _U(cand_fp[t])
                    p = _U(placement[r])
                    w = pbid[p] if fixed_bid else value[r] * scale
                    b = w
                    if not shade_on:
                        pass
                    elif grid[p, G_SLOW]:  # the same for every row of a placement
                        b = shade(w, np.int64(p), offsets, knots_w, knots_b, linear, tab_fp)
                        if b > w:
                            b = w
                    else:  # shade_fast, written out (see grid_lookup)
                        b, cell = grid_lookup(w, p, grid, rec, mask)
                        if w > rec[cell, R_NEXT]:
                            h = gidx[cell] + 2
                            while h < grid[p, G_HI] and knots_w[h] < w:
                                h += 1
                            b = knots_b[h - 1]
                        b = pick(mask[np.int64(b < w)], b, w)
                    paid_buf[r - base] = b
                # Pass 3: the won rows in row order, so every sum adds in the same
                # order as the per-row loop (bit-identical totals).
                r_stop = -1
                for t in range(m):
                    r = _U(cand[t])
                    p = _U(placement[r])
                    c = price[r]
                    paid = paid_buf[r - base]
                    if sampled:  # charged with probability q: a product, no branch
                        q = charge_prob[r]
                        ch = (paid / q) * unit[np.int64(uniforms[r] < q)]
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
                        r_stop = np.int64(r)
                        break
                if r_stop >= 0:
                    # The budget ran out at r_stop: rows after it were not bid on.
                    bids = r_stop - i + 1
                    for r in range(r_stop + 1, r1):
                        p = placement[r]
                        w = pbid[p] if fixed_bid else value[r] * scale
                        above -= w > above_w[p]
                    if ex_ts < 0:
                        ex_ts = float(ts[r_stop])
                    break
                r0 = r1
        elif not fast:
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
                        # a call (reference counting its arrays) is fine off the fast path
                        b = shade_fast(w, p, offsets, knots_w, knots_b, linear, tab_fp,
                                       grid, rec, gidx, mask)
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
        k += 1
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


_FUSED: dict[tuple[object, bool], object] = {}


def fused_loop(update, one_row: bool = False):
    """The replay loop compiled with ``update`` (an ``@njit`` function
    ``update(state, params, fb)``: ``fb`` the float64 array, or in the per-request stretch a
    tuple of ``FB_SIZE`` floats) inlined at each boundary; built once per (update function,
    ``one_row``) and process, and cached on disk where the update can be imported by name
    (see ``replay.kernels._fused_build``).

    ``one_row``: also compile the per-request stretch (see the module docstring). A separate
    build because its code, even never run, slowed the batch passes by about 8 % (measured
    in interleaved runs; LLVM allocates registers over the whole function).

    Inlining matters: a call to a separately compiled function passing three arrays costs
    more (reference counting) than a per-request rule's whole update.
    """
    key = (update, bool(one_row))
    loop = _FUSED.get(key)
    if loop is None:
        if key == (no_update, False):
            loop = replay_fused_loop
        else:
            from replay.kernels._fused_build import build_fused_loop

            loop = build_fused_loop(update, bool(one_row))
        _FUSED[key] = loop
    return loop


def replay_fused(update, *args, one_row: bool = False):
    """``fused_loop(update, one_row)(*args)``: see ``replay_fused_loop`` for the arguments."""
    return fused_loop(update, one_row)(*args)
