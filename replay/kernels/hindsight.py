"""Hindsight optimum of one campaign: the exact LP over its logged rows.

The LP: maximize ``sum v_t x_t`` subject to ``sum c_t x_t <= B`` and, with a cost-per-result
cap ``C``, ``sum c_t x_t <= C sum v_t x_t``; ``0 <= x_t <= 1``. ``v`` is value (results per
impression), ``c`` the minimum winning price (currency per impression). In hindsight the
auction type does not matter (bid exactly the minimum winning price).

Solution shape. With multipliers ``lambda`` (budget) and ``mu`` (cap) the reduced value of
a row is ``v (1 + mu C) - c (lambda + mu)``, so the optimum takes the rows in decreasing
ratio ``r = v / c`` (a fractional knapsack, Dantzig 1957). The cap constraint adds rows
with ``c - C v <= 0`` (``r >= 1/C``) for free and is tightened by the others; the running
cost per result of a prefix only grows down the ratio order, so the cap allows a prefix
too, and the optimum is the shorter of the budget prefix and the cap prefix, plus a
fraction of its marginal row. Multipliers (from the LP dual):

- budget binds: ``lambda = r_m`` (ratio of the marginal row), ``mu = 0``;
- cap binds: ``lambda = 0``, ``mu = r_m / (1 - C r_m)`` (from ``r_m = mu / (1 + mu C)``);
- nothing binds: both 0, every useful row is taken.

Row conventions:

- ``min_win_price == 0``: ratio ``inf``, always taken (costs nothing), also when value is 0.
- ``value == 0`` and a positive price: never taken. When the budget binds its reduced value
  is negative; when nothing binds the LP is indifferent and we leave it out (it adds spend
  and no results).
- Ties: rows are ordered by ratio descending, then price ascending, so the integral set is
  the same for any row order (rows equal in both are interchangeable).

The integral solution is the threshold set without the marginal row: every row strictly
before the marginal in that order. Its spend never exceeds the budget and it satisfies the
cap; its results are within one row's value of ``upper_bound``.

Speed: ``solve`` finds the marginal row by a weighted selection (a Floyd-Rivest style
sample bracket, then recursion on the bracket), expected O(n) without sorting;
``budget_curve`` sorts once and answers every budget by ``searchsorted``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

_SMALL = 2048  # below this many rows the selection sorts
_SAMPLE = 8192  # sample size of one bracket step
_FM = {"reassoc", "contract", "nsz"}  # vectorizable sums; NaN and inf keep their meaning


@dataclass(frozen=True)
class HindsightSolution:
    """Hindsight LP optimum of one campaign (currency, results, results per currency)."""

    upper_bound: float  # fractional LP optimum (results)
    results: float  # results of the integral threshold solution
    spend: float  # currency spent by the integral solution
    wins: int  # rows won by the integral solution
    cost_per_result: float  # spend / results (nan when results is 0)
    lambda_: float  # budget multiplier, results per currency; 0 when the budget does not bind
    mu: float  # cap multiplier; 0 when the cap does not bind
    binding: str  # "budget" | "cap" | "none"
    surplus: float  # sum_t (v_t - lambda c_t)^+
    dual_value: float  # lambda B + sum_t (v_t (1 + mu C) - c_t (lambda + mu))^+
    gap: float  # dual_value - upper_bound (0 up to rounding)
    taken: np.ndarray | None = None  # bool mask of the integral solution, when asked
    spend_upper_bound: float = 0.0  # spend of the fractional solution (currency)
    marginal_ratio: float = 0.0  # ratio v/c of the marginal row (0 when none)


# --------------------------------------------------------------------------- numba core
# Every pass compares keys through the same division v / p (ratio) and then the price, so
# the selection, the final pass and the curve's sort agree bit for bit; the error model is
# numpy's (x / 0 gives inf or nan, never an exception; zero-price rows are handled apart).


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _before(v1: float, p1: float, v2: float, p2: float) -> bool:
    # Strict order of the greedy: ratio v/p descending, then price ascending.
    a = v1 / p1
    b = v2 / p2
    return (a > b) | ((a == b) & (p1 < p2))


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _same(v1: float, p1: float, v2: float, p2: float) -> bool:
    return (v1 / p1 == v2 / p2) & (p1 == p2)


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _cand_w(v: float, p: float, mode: int, cap: float) -> tuple[bool, float]:
    # mode 0: budget, weight = price; mode 1: cap, weight = c - C v (> 0 for candidates).
    if mode == 0:
        return (v > 0.0) & (p > 0.0), p
    w = p - cap * v
    return (v > 0.0) & (p > 0.0) & (w > 0.0), w


@njit(cache=True, nogil=True, error_model="numpy")
def _valid(V, P) -> bool:
    bad = False
    for i in range(V.shape[0]):
        v = V[i]
        p = P[i]
        bad |= not ((v >= 0.0) & (v < np.inf) & (p >= 0.0) & (p < np.inf))
    return not bad


@njit(cache=True, nogil=True, error_model="numpy")
def _key_sort(V, P):
    """Indices of (V, P) in the greedy order: price ascending, then stably ratio descending."""
    n = V.shape[0]
    o1 = np.argsort(P, kind="mergesort")
    r = np.empty(n)
    for i in range(n):
        r[i] = -(V[o1[i]] / P[o1[i]])
    return o1[np.argsort(r, kind="mergesort")]


@njit(cache=True, nogil=True, error_model="numpy")
def _select_sorted(V, P, mode, cap, target):
    """Exact marginal by sorting (small inputs).

    Returns found, marginal key (kv, kp), m (equal rows before it), and the results, spend
    and count of the candidate rows strictly before the marginal's key group.
    """
    n = V.shape[0]
    cnt = 0
    V2 = np.empty(n)
    P2 = np.empty(n)
    for i in range(n):
        c, _ = _cand_w(V[i], P[i], mode, cap)
        if c:
            V2[cnt] = V[i]
            P2[cnt] = P[i]
            cnt += 1
    V2 = V2[:cnt]
    P2 = P2[:cnt]
    order = _key_sort(V2, P2)
    cum = 0.0
    for k in range(cnt):
        j = order[k]
        _, w = _cand_w(V2[j], P2[j], mode, cap)
        if cum + w > target:
            s = k
            while s > 0 and _same(V2[order[s - 1]], P2[order[s - 1]], V2[j], P2[j]):
                s -= 1
            rr = 0.0
            ss = 0.0
            for q in range(s):
                rr += V2[order[q]]
                ss += P2[order[q]]
            return True, V2[j], P2[j], k - s, rr, ss, s
        cum += w
    return False, 0.0, 1.0, 0, 0.0, 0.0, 0


@njit(cache=True, nogil=True, inline="always", error_model="numpy")
def _groups(vi, pi, mode, cap, has_a, av, ap, has_z, zv, zp):
    # Integer flags (branch-free): candidate, before the bracket (1), in it (2), after (3).
    c, w = _cand_w(vi, pi, mode, cap)
    e1 = np.int64(has_a & _before(vi, pi, av, ap))
    e3 = np.int64(has_z & _before(zv, zp, vi, pi))
    ci = np.int64(c)
    g1 = ci * e1
    g2 = ci * (1 - e1) * (1 - e3)
    g3 = ci * (1 - e1) * e3
    return w, g1, g2, g3


@njit(cache=True, nogil=True, fastmath=_FM, error_model="numpy")
def _bracket_count(V, P, mode, cap, has_a, av, ap, has_z, zv, zp, V2, P2):
    """Sums over the groups, writing bracket rows into V2/P2 while they fit.

    Blocks of 16 rows: the sums are branch-free (vectorizable) and only a block holding a
    bracket row takes the store branch, which is rare since the bracket is a few percent
    of the rows. The caller copies again (``_bracket_copy``) when n2 exceeds the buffer.
    """
    capacity = V2.shape[0]
    w1 = 0.0
    w2 = 0.0
    r1 = 0.0
    s1 = 0.0
    n1 = 0
    n2 = 0
    n3 = 0
    n = V.shape[0]
    nb = n // 16
    for blk in range(nb + 1):
        base = blk * 16
        stop = min(16, n - base)
        m2 = 0
        for j in range(stop):
            vi = V[base + j]
            pi = P[base + j]
            w, g1, g2, g3 = _groups(vi, pi, mode, cap, has_a, av, ap, has_z, zv, zp)
            w1 += w * g1
            w2 += w * g2
            r1 += vi * g1
            s1 += pi * g1
            n1 += g1
            n3 += g3
            m2 |= g2 << j
        if m2 != 0:
            for j in range(stop):
                if (m2 >> j) & 1:
                    if n2 < capacity:
                        V2[n2] = V[base + j]
                        P2[n2] = P[base + j]
                    n2 += 1
    return w1, w2, r1, s1, n1, n2, n3


@njit(cache=True, nogil=True, error_model="numpy")
def _bracket_copy(V, P, mode, cap, has_a, av, ap, has_z, zv, zp, n2):
    V2 = np.empty(n2 + 1)
    P2 = np.empty(n2 + 1)
    k = 0
    for i in range(V.shape[0]):
        vi = V[i]
        pi = P[i]
        _, _, g2, _ = _groups(vi, pi, mode, cap, has_a, av, ap, has_z, zv, zp)
        V2[k] = vi
        P2[k] = pi
        k = min(k + g2, n2)
    return V2[:n2], P2[:n2]


@njit(cache=True, nogil=True, error_model="numpy")
def _select(V, P, mode, cap, target):
    """Marginal row of the greedy for ``target`` total weight, expected linear time.

    Returns (found, kv, kp, m, r_before, s_before, n_before): value and price of the
    marginal row, how many rows equal to it come before it, and the results, spend and
    count of the candidates strictly before its key. ``found`` is False when all fit.
    """
    np.random.seed(20260101)  # the answer does not depend on it, only the work does
    b = target
    acc_r = 0.0
    acc_s = 0.0
    acc_n = 0
    while True:
        n = V.shape[0]
        if n <= _SMALL:
            f, kv, kp, m, rr, ss, nn = _select_sorted(V, P, mode, cap, b)
            return f, kv, kp, m, acc_r + rr, acc_s + ss, acc_n + nn
        # A sample brackets the crossing point (Floyd-Rivest style).
        sv = np.empty(_SAMPLE)
        sp = np.empty(_SAMPLE)
        sw = np.empty(_SAMPLE)
        ns = 0
        for _ in range(_SAMPLE):
            i = np.random.randint(0, n)
            c, w = _cand_w(V[i], P[i], mode, cap)
            if c:
                sv[ns] = V[i]
                sp[ns] = P[i]
                sw[ns] = w
                ns += 1
        if ns < 64:
            # Few candidates: compact them and go on (shrinks n by a large factor).
            w1, w2, r1, s1, n1, n2, n3 = _bracket_count(
                V, P, mode, cap, False, 0.0, 1.0, False, 0.0, 1.0, np.empty(1), np.empty(1))
            if n2 * 2 > n:
                f, kv, kp, m, rr, ss, nn = _select_sorted(V, P, mode, cap, b)
                return f, kv, kp, m, acc_r + rr, acc_s + ss, acc_n + nn
            V, P = _bracket_copy(V, P, mode, cap, False, 0.0, 1.0, False, 0.0, 1.0, n2)
            continue
        sv = sv[:ns]
        sp = sp[:ns]
        order = _key_sort(sv, sp)
        scale = n / _SAMPLE
        cum = 0.0
        jx = ns
        for k in range(ns):
            cum += sw[order[k]] * scale
            if cum > b:
                jx = k
                break
        delta = int(3.0 * math.sqrt(ns)) + 1
        lo = jx - delta
        hi = jx + delta
        capacity = min(n, int(4.0 * n * (2 * delta + 1) / ns) + 1024)
        B2 = np.empty(capacity)
        C2 = np.empty(capacity)
        while True:
            has_a = lo >= 0
            has_z = hi < ns
            av = sv[order[lo]] if has_a else 0.0
            ap = sp[order[lo]] if has_a else 1.0
            zv = sv[order[hi]] if has_z else 0.0
            zp = sp[order[hi]] if has_z else 1.0
            w1, w2, r1, s1, n1, n2, n3 = _bracket_count(V, P, mode, cap, has_a, av, ap,
                                                        has_z, zv, zp, B2, C2)
            if w1 > b:
                # The marginal lies before the bracket: move the bracket up.
                hi = lo
                lo = lo - 4 * delta
                delta *= 2
                continue
            if w1 + w2 <= b:
                if not has_z or n3 == 0:
                    return False, 0.0, 1.0, 0, 0.0, 0.0, 0
                lo = hi
                hi = hi + 4 * delta
                delta *= 2
                continue
            break
        if n2 <= capacity:
            V2, P2 = B2[:n2], C2[:n2]
        else:
            V2, P2 = _bracket_copy(V, P, mode, cap, has_a, av, ap, has_z, zv, zp, n2)
        b -= w1
        acc_r += r1
        acc_s += s1
        acc_n += n1
        if has_a and has_z and _same(av, ap, zv, zp):
            # The bracket is one group of identical keys: the marginal is inside it.
            _, w = _cand_w(V2[0], P2[0], mode, cap)
            m = int(b // w)
            if m >= n2:
                m = n2 - 1
            return True, av, ap, m, acc_r, acc_s, acc_n
        if n2 * 2 > n:
            f, kv, kp, m, rr, ss, nn = _select_sorted(V2, P2, mode, cap, b)
            return f, kv, kp, m, acc_r + rr, acc_s + ss, acc_n + nn
        V = V2
        P = P2


@njit(cache=True, nogil=True, fastmath=_FM, error_model="numpy")
def _certificate(V, P, lam, gain, cost):
    """One branch-free pass: validity, the dual sums and the zero-price totals.

    surplus = sum (v - lam c)^+; dual_sum = sum (v gain - c cost)^+; r0, n0: results and
    count of the zero-price rows (always taken).
    """
    bad = 0
    surplus = 0.0
    dual_sum = 0.0
    r0 = 0.0
    n0 = 0
    for i in range(V.shape[0]):
        v = V[i]
        p = P[i]
        bad += not ((v >= 0.0) & (v < np.inf) & (p >= 0.0) & (p < np.inf))
        surplus += max(v - lam * p, 0.0)
        dual_sum += max(v * gain - p * cost, 0.0)
        z = p == 0.0
        r0 += v * z
        n0 += z
    return bad == 0, surplus, dual_sum, r0, n0


@njit(cache=True, nogil=True, fastmath=_FM, error_model="numpy")
def _class_totals(V, P, cap):
    """Results, spend and count of all useful rows (v > 0, c > 0) and of those free under
    the cap (c - C v <= 0)."""
    rf = 0.0
    sf = 0.0
    nf = 0
    ra = 0.0
    sa = 0.0
    na = 0
    for i in range(V.shape[0]):
        v = V[i]
        p = P[i]
        u = (v > 0.0) & (p > 0.0)
        ra += v * u
        sa += p * u
        na += u
        f = u & (p - cap * v <= 0.0)
        rf += v * f
        sf += p * f
        nf += f
    return rf, sf, nf, ra, sa, na


@njit(cache=True, nogil=True, error_model="numpy")
def _cap_slack(V, P, cap):
    """C * results - spend of the rows the cap takes for free (zero price or c - C v <= 0)."""
    s = 0.0
    for i in range(V.shape[0]):
        v = V[i]
        p = P[i]
        d = cap * v - p
        free = (p == 0.0) | ((v > 0.0) & (d >= 0.0))
        s += d if free else 0.0
    return s


@njit(cache=True, nogil=True, error_model="numpy")
def _mask_pass(V, P, found, kv, kp, m, mask):
    """Bool mask of the threshold set before key (kv, kp), with m equal rows taken."""
    seen_eq = 0
    for i in range(V.shape[0]):
        v = V[i]
        p = P[i]
        if found:
            take = (p == 0.0) | _before(v, p, kv, kp)
            if _same(v, p, kv, kp):
                take = seen_eq < m
                seen_eq += 1
        else:
            take = (v > 0.0) | (p == 0.0)
        mask[i] = take


# --------------------------------------------------------------------------- public API


def _as_arrays(value: np.ndarray, min_win_price: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    v = np.ascontiguousarray(value, dtype=np.float64)
    p = np.ascontiguousarray(min_win_price, dtype=np.float64)
    if v.shape != p.shape or v.ndim != 1:
        raise ValueError(f"value and min_win_price must be 1-d arrays of one length, got "
                         f"{v.shape} and {p.shape}")
    return v, p


def _check_inputs(value: np.ndarray, min_win_price: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    v, p = _as_arrays(value, min_win_price)
    if not _valid(v, p):
        raise ValueError("value and min_win_price must be finite and >= 0 (results per "
                         "impression, currency per impression)")
    return v, p


def _check_budget(budget: float | None, cap: float | None) -> tuple[float, float | None]:
    b = math.inf if budget is None else float(budget)
    if math.isnan(b) or b < 0:
        raise ValueError(f"budget must be a number >= 0 (currency), got {budget!r}")
    if cap is not None:
        cap = float(cap)
        if not (cap > 0) or math.isinf(cap):
            raise ValueError(f"max_cost_per_result must be a finite number > 0, got {cap!r}")
    return b, cap


def solve(value: np.ndarray, min_win_price: np.ndarray, budget: float | None,
          max_cost_per_result: float | None = None, *,
          return_mask: bool = False) -> HindsightSolution:
    """Exact hindsight optimum for one campaign's rows.

    ``budget`` in currency (``None`` or ``inf``: no budget constraint);
    ``max_cost_per_result`` in currency per result (None: no cap). Expected O(n).
    """
    v, p = _as_arrays(value, min_win_price)
    b, cap = _check_budget(budget, max_cost_per_result)
    capf = 0.0 if cap is None else cap

    # The selections tolerate bad numbers (they end); the totals pass below rejects them.
    sel_b = (False, 0.0, 1.0, 0, 0.0, 0.0, 0)
    if math.isfinite(b):
        sel_b = _select(v, p, 0, 0.0, b)
    sel_c = (False, 0.0, 1.0, 0, 0.0, 0.0, 0)
    if cap is not None:
        sel_c = _select(v, p, 1, cap, _cap_slack(v, p, cap))
    found_b, bv, bp, bm = sel_b[:4]
    found_c, cv, cp, cm = sel_c[:4]

    # The marginal reached first in the greedy order binds; on the same row, the smaller
    # fraction decides (below).
    if found_b and found_c:
        cap_first = bool(_before(cv, cp, bv, bp)) or (bool(_same(cv, cp, bv, bp)) and cm < bm)
        binding = "cap" if cap_first else "budget"
    else:
        binding = "budget" if found_b else ("cap" if found_c else "none")
    same_row = found_b and found_c and bool(_same(cv, cp, bv, bp)) and cm == bm
    kv, kp = {"budget": (bv, bp), "cap": (cv, cp)}.get(binding, (0.0, 1.0))
    ratio = kv / kp if binding != "none" else 0.0

    def multipliers(kind: str) -> tuple[float, float]:
        if kind == "budget":
            return ratio, 0.0
        if kind == "cap":
            return 0.0, ratio / (1.0 - capf * ratio)
        return 0.0, 0.0

    def integral(kind: str) -> tuple[float, float, int]:
        # Results, spend and wins of the threshold set (zero-price rows always in).
        if kind == "none":
            return r0 + ra, sa, n0 + na
        f, _, _, m, rr, ss, nn = sel_b if kind == "budget" else sel_c
        if kind == "cap":  # the cap selection ran over the rows not free under the cap
            rr, ss, nn = rr + rf, ss + sf, nn + nf
        return r0 + rr + m * kv, ss + m * kp, n0 + nn + m

    lam, mu = multipliers(binding)
    ok, surplus, dual_sum, r0, n0 = _certificate(v, p, lam, 1.0 + mu * capf, lam + mu)
    if not ok:
        raise ValueError("value and min_win_price must be finite and >= 0 (results per "
                         "impression, currency per impression)")
    rf = sf = ra = sa = 0.0
    nf = na = 0
    if cap is not None or binding == "none":
        rf, sf, nf, ra, sa, na = _class_totals(v, p, capf)
    results, spend, wins = integral(binding)
    frac = 0.0
    if binding != "none":
        frac_b = (b - spend) / kp if math.isfinite(b) else math.inf
        frac_c = (capf * results - spend) / (kp - capf * kv) if cap is not None else math.inf
        if binding == "budget" and same_row and frac_c < frac_b:
            binding = "cap"
            lam, mu = multipliers(binding)
            _, surplus, dual_sum, _, _ = _certificate(v, p, lam, 1.0 + mu * capf, lam + mu)
        frac = frac_b if binding == "budget" else frac_c
        frac = min(max(frac, 0.0), 1.0)
    upper_bound = results + frac * kv
    dual_value = (lam * b if lam > 0 else 0.0) + dual_sum
    mask = None
    if return_mask:
        mask = np.empty(v.shape[0], dtype=np.bool_)
        m = {"budget": bm, "cap": cm}.get(binding, 0)
        _mask_pass(v, p, binding != "none", kv, kp, m, mask)
    return HindsightSolution(
        upper_bound=float(upper_bound), results=float(results), spend=float(spend),
        wins=int(wins),
        cost_per_result=float(spend / results) if results > 0 else math.nan,
        lambda_=float(lam), mu=float(mu), binding=binding, surplus=float(surplus),
        dual_value=float(dual_value), gap=float(dual_value - upper_bound),
        taken=mask, spend_upper_bound=float(spend + frac * kp), marginal_ratio=float(ratio),
    )


@njit(cache=True, nogil=True, error_model="numpy")
def _greedy_keys(v, p):
    """Sort keys of the rows with v > 0 and p > 0, and the candidates' row indices.

    The key packs the ratio's bit pattern (for a non-negative double it orders like the
    value), inverted for descending order and cut by ``shift`` low bits, above the
    candidate's position; rows with equal cut keys are ordered exactly afterwards.
    """
    n = v.shape[0]
    cand = np.empty(n, np.int64)
    c = 0
    for i in range(n):
        if (v[i] > 0.0) & (p[i] > 0.0):
            cand[c] = i
            c += 1
    shift = 1
    while (1 << shift) < c:
        shift += 1
    ratio = np.empty(c)
    for j in range(c):
        ratio[j] = v[cand[j]] / p[cand[j]]
    key = ratio.view(np.int64)  # reuses the buffer: ratio is not needed afterwards
    top = np.int64(0x7FF0000000000000)
    for j in range(c):
        key[j] = (((top - key[j]) >> shift) << shift) | j
    return key, cand[:c].copy(), shift


@njit(cache=True, nogil=True, error_model="numpy")
def _greedy_decode(key, cand, shift, v, p):
    c = key.shape[0]
    mask = (np.int64(1) << shift) - 1
    order = np.empty(c, np.int64)
    for j in range(c):
        order[j] = cand[key[j] & mask]
    # Exact order inside groups of equal cut keys (near or exact ties).
    j = 0
    while j < c:
        k = j + 1
        hi = key[j] >> shift
        while k < c and (key[k] >> shift) == hi:
            k += 1
        if k - j > 1:
            sub = order[j:k].copy()
            o = _key_sort(v[sub], p[sub])
            for q in range(k - j):
                order[j + q] = sub[o[q]]
        j = k
    return order


def _greedy_order(v: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Row indices (v > 0, p > 0) in the greedy order: ratio descending, price ascending."""
    key, cand, shift = _greedy_keys(v, p)
    key.sort()  # numpy's vectorized integer sort, several times faster than an argsort
    return _greedy_decode(key, cand, shift, v, p)


@njit(cache=True, nogil=True, error_model="numpy")
def _scan(order, v, p, budgets_sorted, has_cap, cap, d0):
    """One pass down the greedy order: for each budget (ascending) the number of rows that
    fit and their spend and results; and where the cap's running slack turns positive.

    The cap slack starts at ``d0`` (C * results - spend of the rows free under the cap,
    negated: <= 0) and adds c - C v per row.
    """
    nb = budgets_sorted.shape[0]
    kb = np.empty(nb, np.int64)
    sb = np.empty(nb)
    rb = np.empty(nb)
    n = order.shape[0]
    q = 0
    cs = 0.0
    cv = 0.0
    d = d0
    kc = n
    sc = 0.0
    rc = 0.0
    dc = 0.0
    for idx in range(n):
        i = order[idx]
        pi = p[i]
        vi = v[i]
        while q < nb and cs + pi > budgets_sorted[q]:
            kb[q] = idx
            sb[q] = cs
            rb[q] = cv
            q += 1
        if has_cap and kc == n:
            step = pi - cap * vi
            if step > 0.0:  # rows free under the cap are already in d0
                if d + step > 0.0:
                    kc = idx
                    sc = cs
                    rc = cv
                    dc = d
                d += step
        if q == nb and (kc < n or not has_cap):
            break
        cs += pi
        cv += vi
    while q < nb:
        kb[q] = n
        sb[q] = cs
        rb[q] = cv
        q += 1
    return kb, sb, rb, kc, sc, rc, dc


def budget_curve(value: np.ndarray, min_win_price: np.ndarray, budgets: np.ndarray,
                 max_cost_per_result: float | None = None) -> dict[str, np.ndarray]:
    """Optimum for every budget in ``budgets`` (currency) from one sort.

    Keys: budget, results (integral), upper_bound (fractional), spend (integral), lambda,
    mu, wins, binding. Agrees with ``solve`` at each budget.
    """
    v, p = _check_inputs(value, min_win_price)
    budgets = np.asarray(budgets, dtype=np.float64).ravel()
    for bb in budgets:
        _check_budget(float(bb), max_cost_per_result)
    cap = None if max_cost_per_result is None else float(max_cost_per_result)
    capf = 0.0 if cap is None else cap
    _, _, _, r0, n0 = _certificate(v, p, 0.0, 1.0, 0.0)
    rf, sf, nf = 0.0, 0.0, 0
    if cap is not None:
        rf, sf, nf, _, _, _ = _class_totals(v, p, capf)
    order = _greedy_order(v, p)
    n = order.shape[0]
    srt = np.argsort(budgets, kind="stable")
    kb_s, sb_s, rb_s, kc, sc, rc, dc = _scan(order, v, p, budgets[srt], cap is not None,
                                             capf, -capf * r0 + (sf - capf * rf))
    kb_all = np.empty_like(kb_s)
    sb_all = np.empty_like(sb_s)
    rb_all = np.empty_like(rb_s)
    kb_all[srt], sb_all[srt], rb_all[srt] = kb_s, sb_s, rb_s
    frac_c = 0.0
    if kc < n:
        i = order[kc]
        frac_c = -dc / (p[i] - capf * v[i])

    nb = budgets.shape[0]
    out = {k: np.zeros(nb) for k in ("results", "upper_bound", "spend", "lambda", "mu")}
    out["budget"] = budgets.copy()
    wins = np.zeros(nb, dtype=np.int64)
    binding = np.empty(nb, dtype=object)
    for j, bb in enumerate(budgets):
        kb = int(kb_all[j])
        frac_b = (bb - sb_all[j]) / p[order[kb]] if kb < n else math.inf
        if kc < kb or (kc == kb and kc < n and frac_c < frac_b):
            k, frac, bind, spent, res = kc, frac_c, "cap", sc, rc
        elif kb < n:
            k, frac, bind, spent, res = kb, frac_b, "budget", sb_all[j], rb_all[j]
        else:
            k, frac, bind, spent, res = n, 0.0, "none", sb_all[j], rb_all[j]
        res = r0 + res
        out["results"][j] = res
        out["spend"][j] = spent
        wins[j] = n0 + k
        binding[j] = bind
        if k < n:
            i = order[k]
            ratio = v[i] / p[i]
            out["upper_bound"][j] = res + min(max(frac, 0.0), 1.0) * v[i]
            if bind == "budget":
                out["lambda"][j] = ratio
            else:
                out["mu"][j] = ratio / (1.0 - capf * ratio)
        else:
            out["upper_bound"][j] = res
    out["wins"] = wins
    out["binding"] = binding
    return out
