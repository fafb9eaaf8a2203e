"""Follow-the-leader index: the exact hindsight multiplier over past rows, incrementally.

Follow the leader needs, at every update, the multiplier ``lambda`` (results per currency)
that a hindsight solve over all rows seen so far would give for a budget ``target_spend``:
take rows in decreasing ratio ``r = value / min_win_price`` until the cumulative cost
(``min_win_price``) first exceeds ``target_spend``; ``lambda`` is the ratio of that marginal
row, and 0 when ``target_spend`` is at least the total cost of all rows (the budget does not
bind). Ties in ``r`` do not matter: the marginal ratio is the same for any order of equal
ratios, so the answer equals a full sort's.

Structure: a radix histogram over the bit pattern of the ratio plus per-bucket row lists.
For a non-negative double the int64 bit pattern orders like the value, so the exponent and
the top 11 mantissa bits split ratios into buckets of relative width 2**-11 (~0.05 %);
2**17 buckets (64 octaves) are centred on the first batch's mean log ratio, and ratios
further out share the two edge buckets (still exact, only slower). Each bucket keeps its
total cost, its row count, a singly linked list of its rows and, while all its rows tie,
their common ratio; 2**9 super-buckets keep the sums of 256 buckets each.

- Insert: O(1) per row, no sort.
- Query: walk the super-buckets, then the buckets, from the top to the bucket where the
  cumulative cost crosses the target (<= ~800 additions); then the marginal row inside that
  bucket, exactly: a tied bucket answers at once; otherwise its rows are gathered and a
  weighted quickselect (expected linear) finds the margin. A bucket queried twice in a row
  is kept sorted in one of 4 cache slots (up to 2**15 rows each), and later queries only
  merge in the rows that arrived since (follow the leader keeps landing in the same
  bucket). So K queries never cost K passes over all rows; one query costs about the rows
  of one bucket (n / occupied buckets) at worst.

A log-structured merge of sorted runs was the first version; on this project's benchmark
(10M rows, 1,000 batches) its inserts alone cost about two full argsorts of all rows, so it
was replaced by the histogram above.

The index is a namedtuple of preallocated numpy arrays, so every function here is an
``@njit`` function callable from Python and from other ``@njit`` code alike::

    from replay.kernels.ftl_index import ftl_index_new, ftl_insert, ftl_lambda_for_spend

    @njit
    def run(values, prices, target):
        idx = ftl_index_new(values.shape[0])
        ftl_insert(idx, values[:1000], prices[:1000])
        return ftl_lambda_for_spend(idx, target)

Ratio conventions: ``min_win_price == 0`` gives ``r = inf`` (always taken, costs nothing),
including ``value == 0``; ``value == 0`` with a positive price gives ``r = 0``. Negative or
NaN inputs raise ``ValueError`` (the ingest layer already rejects them).

Memory: 24 bytes per stored row (allocated for ``capacity`` rows, touched as rows arrive)
plus 5 MiB of buckets and 2 MiB of cache slots per index. Costs are summed in
float64 in a different order than a full cumulative sum, so only a target within rounding
(~1e-15 relative) of a cumulative sum can pick the neighbouring row.
"""

from __future__ import annotations

from collections import namedtuple

import numpy as np
from numba import njit

from replay.kernels.bits import f64_bits

_BUCKET_BITS = 17
N_BUCKETS = 1 << _BUCKET_BITS
_SHIFT = 52 - 11  # bits >> _SHIFT: exponent and 11 mantissa bits (relative width 2**-11)
_SUPER_BITS = 8  # buckets per super-bucket: 2**8
N_SUPER = N_BUCKETS >> _SUPER_BITS
_SMALL = 24  # below this many rows, the in-bucket selection sorts instead of partitioning
_SLOTS = 4  # buckets whose sorted rows are kept between queries
_SLOT_ROWS = 1 << 15  # most rows a cached bucket may hold (larger ones use quickselect)
# state_i slots beyond (inserted, stored, base key): the band of buckets that keep row
# lists (first and last bucket, -1 = none yet), its next half-width, and moves so far.
_I_BAND_LO = 3
_I_BAND_HI = 4
_I_BAND_W = 5
_I_MOVES = 6
_I_LINKS = 7  # link records in use
_BAND0 = 64  # initial half-width in buckets (~3 % of ratio either side)
_BAND_MAX = 1 << 12
# Bucket record layout in ``bucket`` (float64, 4 slots per bucket; int slots via ``bucket_i``).
# A bucket's total cost lives in the dense ``bcost`` instead: every insert adds to it at a
# random bucket, and 8 bytes per bucket (1 MiB) stay in L2 where 32 would not.
_B_SPARE = 0  # unused
_B_COUNT = 1  # rows (int64 view)
_B_HEAD = 2  # first row of the list, -1 = none (int64 view)
_B_FIRST = 3  # the ratio if every row of the bucket has the same one, NaN if mixed
_PENDING = 4096  # rows per chunk of ftl_insert (its band rows are linked after the chunk)
# Row record layout in ``rows`` (float64, 2 slots per row); band rows are also on a
# bucket list of link records in ``links`` (int64, 2 slots: row, next link or -1).
_R_RATIO = 0
_R_COST = 1
_L_ROW = 0
_L_NEXT = 1

FtlIndex = namedtuple(
    "FtlIndex",
    ["rows", "links", "bucket", "bucket_i", "bcost", "scost", "state_i", "state_f",
     "cache_r", "cache_c", "cache_meta"],
)
FtlIndex.__doc__ = """Past rows bucketed by ratio (see the module docstring).

rows: float64[3 * capacity], per stored row (ratio, cost, link to the next row of its
bucket); rows_i: the same memory as int64. bucket: float64[4 * N_BUCKETS], per bucket
(spare, count, head row, common ratio or NaN); bucket_i: the same memory as int64.
bcost: float64[N_BUCKETS] total cost per bucket; scost: float64[N_SUPER] per super-bucket.
state_i: int64[3] = (rows inserted, rows stored, bucket base key; -1 until the first
positive ratio arrives). state_f: float64[2] =
(total cost, cost of rows with ratio 0). Rows with price 0 (ratio inf) and rows with value 0
(ratio 0) are counted but not stored: they are never inside the search.
cache_r, cache_c: float64[_SLOTS * slot size], the rows of recently queried buckets sorted by
decreasing ratio; cache_meta: int64[3 * _SLOTS + 2] = per slot (bucket or -1, rows cached,
newest cached row), the next slot to evict, the last bucket queried without a slot.
"""


@njit(cache=True, nogil=True)
def ftl_index_new(capacity: int) -> FtlIndex:
    """An empty index for up to ``capacity`` rows (all memory allocated here)."""
    if capacity < 0:
        raise ValueError("ftl_index_new: capacity must be >= 0")
    cap = max(capacity, 1)
    rows = np.empty(2 * cap, np.float64)
    bucket = np.zeros(4 * N_BUCKETS, np.float64)
    bucket_i = bucket.view(np.int64)
    for b in range(N_BUCKETS):
        bucket_i[4 * b + _B_HEAD] = -1
    slot = min(cap, _SLOT_ROWS)
    meta = np.full(3 * _SLOTS + 2, -1, np.int64)
    meta[3 * _SLOTS] = 0
    return FtlIndex(
        rows, np.empty(2 * cap, np.int64), bucket, bucket_i,
        np.zeros(N_BUCKETS, np.float64), np.zeros(N_SUPER, np.float64),
        np.array([0, 0, -1, -1, -1, _BAND0, 0, 0], np.int64),
        np.zeros(2, np.float64),
        np.empty(_SLOTS * slot, np.float64),
        np.empty(_SLOTS * slot, np.float64),
        meta,
    )


@njit(cache=True, nogil=True)
def ftl_index_reset(index: FtlIndex) -> None:
    """Empty ``index`` in place, keeping its memory: a rule replayed again (a sweep, a
    benchmark repeat) then skips the operating system's zeroing of fresh pages, which
    costs about as much as inserting the rows."""
    bucket = index.bucket
    bucket_i = index.bucket_i
    for b in range(N_BUCKETS):
        q = 4 * b
        bucket[q + _B_SPARE] = 0.0
        bucket_i[q + _B_COUNT] = 0
        bucket_i[q + _B_HEAD] = -1
        bucket[q + _B_FIRST] = 0.0
    index.bcost[:] = 0.0
    index.scost[:] = 0.0
    st = index.state_i
    st[0] = 0
    st[1] = 0
    st[2] = -1
    st[_I_BAND_LO] = -1
    st[_I_BAND_HI] = -1
    st[_I_BAND_W] = _BAND0
    st[_I_MOVES] = 0
    st[_I_LINKS] = 0
    index.state_f[:] = 0.0
    meta = index.cache_meta
    meta[:] = -1
    meta[3 * _SLOTS] = 0


@njit(cache=True, nogil=True)
def ftl_count(index: FtlIndex) -> int:
    """Rows inserted so far."""
    return index.state_i[0]


@njit(cache=True, nogil=True)
def ftl_total_spend(index: FtlIndex) -> float:
    """Total cost (sum of min_win_price, currency) of all inserted rows."""
    return index.state_f[0]


@njit(cache=True, nogil=True)
def ftl_capacity(index: FtlIndex) -> int:
    """Rows the index can hold."""
    return index.rows.shape[0] // 2


@njit(cache=True, nogil=True, inline="always")
def _link(links, bucket, bucket_i, q, j, r, n_links):
    """Push stored row ``j`` (ratio ``r``) on the list of the bucket at record ``q`` as link
    record ``n_links``."""
    links[2 * n_links + _L_ROW] = j
    links[2 * n_links + _L_NEXT] = bucket_i[q + _B_HEAD]
    bucket_i[q + _B_HEAD] = n_links
    n_b = bucket_i[q + _B_COUNT]
    if n_b == 0:
        bucket[q + _B_FIRST] = r
    elif bucket[q + _B_FIRST] != r:
        bucket[q + _B_FIRST] = np.nan
    bucket_i[q + _B_COUNT] = n_b + 1


@njit(cache=True, nogil=True)
def _move_band(index: FtlIndex, centre: int) -> None:
    """Make buckets ``centre +- width`` the band: relink their rows from all stored rows
    (oldest first, so each list is newest first as incremental inserts leave it), forget
    the old band's lists and the sorted-bucket cache, then double the width for next time
    (up to ``_BAND_MAX``) so a drifting multiplier moves the band ever more rarely."""
    st = index.state_i
    bucket = index.bucket
    bucket_i = index.bucket_i
    rows = index.rows
    links = index.links
    top = N_BUCKETS - 1
    old_lo = st[_I_BAND_LO]
    old_hi = st[_I_BAND_HI]
    if old_lo >= 0:
        for b in range(old_lo, old_hi + 1):
            bucket_i[4 * b + _B_HEAD] = -1
            bucket_i[4 * b + _B_COUNT] = 0
    width = st[_I_BAND_W]
    lo = max(0, centre - width)
    hi = min(top, centre + width)
    for b in range(lo, hi + 1):
        bucket_i[4 * b + _B_HEAD] = -1
        bucket_i[4 * b + _B_COUNT] = 0
    base = st[2]
    n_links = 0
    for j in range(st[1]):
        r = rows[2 * j + _R_RATIO]
        b = (f64_bits(r) >> _SHIFT) - base
        if b < 0:
            b = 0
        elif b > top:
            b = top
        if lo <= b <= hi:
            _link(links, bucket, bucket_i, 4 * b, j, r, n_links)
            n_links += 1
    st[_I_LINKS] = n_links
    st[_I_BAND_LO] = lo
    st[_I_BAND_HI] = hi
    st[_I_BAND_W] = min(2 * width, _BAND_MAX)
    st[_I_MOVES] += 1
    meta = index.cache_meta
    for k in range(_SLOTS):
        meta[3 * k] = -1
    meta[3 * _SLOTS + 1] = -1


@njit(cache=True, nogil=True)
def ftl_band_moves(index: FtlIndex) -> int:
    """How many times the band of row-keeping buckets was rebuilt (a diagnostic)."""
    return index.state_i[_I_MOVES]


@njit(cache=True, nogil=True)
def ftl_insert(index: FtlIndex, value: np.ndarray, price: np.ndarray) -> None:
    """Add past rows: ``value`` (results per impression) and ``price`` (min_win_price,
    currency per impression), float64 arrays of equal length."""
    m = value.shape[0]
    if price.shape[0] != m:
        raise ValueError("ftl_insert: value and price must have the same length")
    if m == 0:
        return
    count = index.state_i[0]
    if count + m > index.rows.shape[0] // 2:
        raise ValueError("ftl_insert: index capacity exceeded (create it with a larger capacity)")
    bad = False
    for i in range(m):  # checked first: a bad row leaves the index as it was
        bad |= not ((value[i] >= 0.0) & (price[i] >= 0.0))
    if bad:
        raise ValueError("ftl_insert: value and price must be >= 0 and not NaN")
    base = index.state_i[2]
    if base < 0:
        # Centre the 2**20 buckets (32 octaves of ratio) on this batch's mean log ratio;
        # ratios further out share the edge buckets, which stays exact (only slower).
        ksum = 0.0
        kn = 0
        for i in range(m):
            v = value[i]
            p = price[i]
            if v > 0.0 and p > 0.0:
                r = v / p
                if r < np.inf:
                    ksum += f64_bits(r) >> _SHIFT
                    kn += 1
        if kn > 0:
            base = int(ksum / kn) - N_BUCKETS // 2
            index.state_i[2] = base
    stored = index.state_i[1]
    rows = index.rows
    links = index.links
    n_links = index.state_i[_I_LINKS]
    bucket = index.bucket
    bucket_i = index.bucket_i
    bcost = index.bcost
    scost = index.scost
    total = 0.0
    zero_cost = 0.0
    top = N_BUCKETS - 1
    band_lo = index.state_i[_I_BAND_LO]
    band_hi = index.state_i[_I_BAND_HI]
    # Only band buckets keep their rows (see the docstring). The rows are bucketed in
    # chunks; each chunk lists its band rows without a jump and links them afterwards:
    # measured, a jump on the band (taken by a few percent of rows) made inserts twice as
    # slow, although it was rarely taken.
    pending = np.empty(min(m, _PENDING), np.int64)
    for c0 in range(0, m, _PENDING):
        n_band = 0
        for i in range(c0, min(c0 + _PENDING, m)):
            v = value[i]
            p = price[i]
            if p == 0.0:
                continue  # ratio inf, cost 0: always taken, never the marginal row
            r = v / p
            if r == np.inf:  # a subnormal price: as free as price 0
                continue
            total += p
            if r == 0.0:
                zero_cost += p  # ratio 0 ranks last; kept as one sum
                continue
            b = min(max((f64_bits(r) >> _SHIFT) - base, 0), top)
            o = 2 * stored
            rows[o + _R_RATIO] = r
            rows[o + _R_COST] = p
            bcost[b] += p
            scost[b >> _SUPER_BITS] += p
            pending[n_band] = stored
            n_band += (band_lo <= b) & (b <= band_hi)
            stored += 1
        for k in range(n_band):
            j = pending[k]
            r = rows[2 * j + _R_RATIO]
            b = min(max((f64_bits(r) >> _SHIFT) - base, 0), top)
            _link(links, bucket, bucket_i, 4 * b, j, r, n_links)
            n_links += 1
    index.state_i[0] = count + m
    index.state_i[1] = stored
    index.state_i[_I_LINKS] = n_links
    index.state_f[0] += total
    index.state_f[1] += zero_cost


@njit(cache=True, nogil=True)
def _select_marginal(r: np.ndarray, c: np.ndarray, t: float) -> float:
    """Ratio of the row where the cost, in decreasing ratio order, first exceeds ``t``
    (the smallest ratio if rounding leaves ``t`` at or above the total). Reorders r, c."""
    lo = 0
    hi = r.shape[0]
    acc = 0.0  # cost of rows known to rank above r[lo:hi]
    while hi - lo > _SMALL:
        # Median of three as pivot; three-way partition: [> p | == p | < p].
        a = r[lo]
        b = r[(lo + hi) >> 1]
        d = r[hi - 1]
        if a < b:
            a, b = b, a
        if b < d:
            b, d = d, b
            if a < b:
                a, b = b, a
        piv = b
        lt = lo  # r[lo:lt] > piv
        i = lo
        gt = hi  # r[gt:hi] < piv
        g_cost = 0.0
        e_cost = 0.0
        while i < gt:
            x = r[i]
            if x > piv:
                g_cost += c[i]
                r[i], r[lt] = r[lt], x
                c[i], c[lt] = c[lt], c[i]
                lt += 1
                i += 1
            elif x < piv:
                gt -= 1
                r[i], r[gt] = r[gt], x
                c[i], c[gt] = c[gt], c[i]
            else:
                e_cost += c[i]
                i += 1
        if acc + g_cost > t:
            hi = lt
        elif acc + g_cost + e_cost > t:
            return piv
        else:
            acc += g_cost + e_cost
            if gt == hi:  # rounding: nothing below; the smallest ratio is the margin
                return piv
            lo = gt
    order = np.argsort(-r[lo:hi])
    last = r[lo + order[0]]
    for q in range(order.shape[0]):
        k = lo + order[q]
        last = r[k]
        acc += c[k]
        if acc > t:
            return last
    return last


@njit(cache=True, nogil=True)
def _cached_select(index: FtlIndex, found: int, m: int, slot_rows: int, t: float) -> float:
    """Marginal ratio inside bucket ``found`` (``m`` rows) through the sorted-bucket cache:
    FTL queries keep landing in the same few buckets, so only rows that arrived since the
    last visit are gathered from the lists (newest first) and merged in. Returns -1 when the
    bucket is not cached yet (the caller then selects without the cache)."""
    meta = index.cache_meta
    rows = index.rows
    links = index.links
    head = index.bucket_i[4 * found + _B_HEAD]
    slot = -1
    for k in range(_SLOTS):
        if meta[3 * k] == found:
            slot = k
            break
    if slot < 0:
        if meta[3 * _SLOTS + 1] != found:
            # First visit: quickselect without caching (a target that jumps around would
            # otherwise pay a sort per query); a second visit in a row builds the cache.
            meta[3 * _SLOTS + 1] = found
            return -1.0
        slot = meta[3 * _SLOTS]
        meta[3 * _SLOTS] = (slot + 1) % _SLOTS
        meta[3 * slot] = found
        meta[3 * slot + 1] = 0
        meta[3 * slot + 2] = -1
    have = meta[3 * slot + 1]
    stop = meta[3 * slot + 2]
    n_new = m - have
    base = slot * slot_rows
    cr = index.cache_r
    cc = index.cache_c
    if n_new > 0:
        nr = np.empty(n_new, np.float64)
        nc = np.empty(n_new, np.float64)
        j = head
        k = 0
        while j >= 0 and j != stop and k < n_new:
            o = 2 * links[2 * j + _L_ROW]
            nr[k] = -rows[o + _R_RATIO]  # negated: ascending sort = decreasing ratio
            nc[k] = rows[o + _R_COST]
            k += 1
            j = links[2 * j + _L_NEXT]
        order = np.argsort(nr)
        # Merge from the end: cached rows [base, base+have) and the new ones, both by
        # decreasing ratio, into [base, base+m).
        i = base + have - 1
        jn = n_new - 1
        w = base + m - 1
        while jn >= 0:
            o = order[jn]
            rn = -nr[o]
            if i >= base and cr[i] < rn:
                cr[w] = cr[i]
                cc[w] = cc[i]
                i -= 1
            else:
                cr[w] = rn
                cc[w] = nc[o]
                jn -= 1
            w -= 1
        meta[3 * slot + 1] = m
        meta[3 * slot + 2] = head
    acc = 0.0
    last = cr[base]
    for k in range(base, base + m):
        last = cr[k]
        acc += cc[k]
        if acc > t:
            return last
    return last


@njit(cache=True, nogil=True)
def ftl_lambda_for_spend(index: FtlIndex, target_spend: float) -> float:
    """Hindsight multiplier (results per currency) over the inserted rows for a budget of
    ``target_spend`` (currency): the ratio of the row at which the cumulative cost in
    decreasing ratio order first exceeds ``target_spend``; 0 when ``target_spend`` is at
    least the total cost (or the index is empty). A negative target counts as 0."""
    if np.isnan(target_spend):
        raise ValueError("ftl_lambda_for_spend: target_spend is NaN")
    target = max(target_spend, 0.0)
    if not (target < index.state_f[0]):
        return 0.0
    if index.state_i[1] == 0 or not (target < index.state_f[0] - index.state_f[1]):
        return 0.0  # the margin is among the ratio-0 rows
    scost = index.scost
    bcost = index.bcost
    bucket = index.bucket
    bucket_i = index.bucket_i
    acc = 0.0
    s = N_SUPER - 1
    while s > 0 and not (acc + scost[s] > target):
        acc += scost[s]
        s -= 1
    # The crossing bucket, from the top of super-bucket s down; if rounding leaves none,
    # the lowest non-empty bucket is the margin.
    b = ((s + 1) << _SUPER_BITS) - 1
    lowest = -1
    found = -1
    while b >= 0:
        bc = bcost[b]
        if bc > 0.0:
            lowest = b
            if acc + bc > target:
                found = b
                break
            acc += bc
        b -= 1
    if found < 0:
        found = lowest
    if found < 0:
        return 0.0
    if not (index.state_i[_I_BAND_LO] <= found <= index.state_i[_I_BAND_HI]):
        _move_band(index, found)
    q = 4 * found
    first = bucket[q + _B_FIRST]
    if not np.isnan(first):
        return first  # all rows of the bucket tie
    m = bucket_i[q + _B_COUNT]
    slot_rows = index.cache_r.shape[0] // _SLOTS
    if m <= slot_rows:
        got = _cached_select(index, found, m, slot_rows, target - acc)
        if got >= 0.0:
            return got
    r = np.empty(m, np.float64)
    c = np.empty(m, np.float64)
    rows = index.rows
    links = index.links
    j = bucket_i[q + _B_HEAD]
    k = 0
    while j >= 0 and k < m:
        o = 2 * links[2 * j + _L_ROW]
        r[k] = rows[o + _R_RATIO]
        c[k] = rows[o + _R_COST]
        k += 1
        j = links[2 * j + _L_NEXT]
    return _select_marginal(r, c, target - acc)
