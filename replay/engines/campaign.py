"""Replay one campaign with one bid rule: fit on the training window, then the replay loop.

``replay_campaign`` is the single entry point the multi-campaign engine calls. It windows
the rows (training rows strictly before the replay window: no look-ahead), fits the
shading tables and the traffic forecast on the training rows, fits the rule, runs the
compiled loop (built-in rules) or the generic loop (a rule with a Python ``update``), and
returns totals, a per-update series and per-placement totals.

Target re-targeting: the target curve is fixed for the flight (``budget * (F(t_end) -
F(t_start))`` per interval); rules that want "remaining budget / remaining forecast" read
``remaining_budget`` and ``remaining_share`` from the feedback (ftl ``retarget=true``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl
from numba import types as nb_types
from numba.core.errors import TypingError

from replay.engines.windows import parse_duration
from replay.errors import UsageError
from replay.kernels import replay_loop as rl
from replay.kernels.bits import MASK, UNIT
from replay.rules.base import BidRule, IntervalFeedback, TrainingContext
from replay.schema import (
    FIRST_PRICE,
    SECOND_PRICE,
    US_PER_DAY,
    US_PER_HOUR,
    US_PER_WEEK,
    CampaignArrays,
    CampaignSpec,
)

CHARGE_MODES = ("expected", "sampled")
SHADING_MODELS = ("empirical", "lognormal", "none")
@dataclass(frozen=True)
class Schedule:
    """When the rule updates: every ``every_us`` microseconds of log time from the flight
    start, or every ``every_n`` requests. Exactly one is set."""

    every_us: int | None = None
    every_n: int | None = None

    def __post_init__(self) -> None:
        if (self.every_us is None) == (self.every_n is None):
            raise UsageError("schedule: give exactly one of --every DUR or --every-n N")
        x = self.every_us if self.every_us is not None else self.every_n
        if not isinstance(x, int | np.integer) or x <= 0:
            raise UsageError(f"schedule: every_us/every_n must be an integer > 0, got {x!r}")

    @classmethod
    def parse(cls, every: str | None = None, every_n: int | None = None) -> Schedule:
        """From CLI options (``every_n`` wins when both are given)."""
        if every_n is not None:
            return cls(every_n=int(every_n))
        return cls(every_us=parse_duration(every or "15min", "--every"))

    def describe(self) -> dict[str, float | int]:
        if self.every_n is not None:
            return {"every_n": int(self.every_n)}
        return {"every_seconds": self.every_us / 1e6}


@dataclass
class CampaignReplay:
    """One campaign's replay: totals, per-update series, per-placement totals, won mask."""

    campaign_id: str
    totals: dict[str, object]
    series: pl.DataFrame
    placements: pl.DataFrame
    won: np.ndarray
    rule: BidRule | None = field(default=None, repr=False)


# ----------------------------------------------------------------------------- forecasts


def traffic_forecast(train_ts: np.ndarray, train_start: int, train_end: int, start: int,
                     end: int) -> tuple[float, tuple[np.ndarray, np.ndarray] | None]:
    """Expected auctions in ``[start, end)`` and the cumulative traffic share curve.

    Profile: auctions per hour of week (training window of at least 7 days) or per hour of
    day (at least 1 day), from the training counts divided by the hours of each kind the
    training window covers; a plain rate for shorter windows. The curve has a knot at
    every hour boundary in the flight.
    """
    n = int(train_ts.shape[0])
    span = max(int(train_end) - int(train_start), 1)
    if n == 0:
        return math.nan, None
    if span >= US_PER_DAY:
        period = US_PER_WEEK if span >= US_PER_WEEK else US_PER_DAY
        buckets = period // US_PER_HOUR
        counts = np.bincount(((train_ts // US_PER_HOUR) % buckets).astype(np.int64),
                             minlength=buckets).astype(np.float64)
        exposure = _bucket_hours(train_start, train_end, buckets)
        rate = np.where(exposure > 0, counts / np.maximum(exposure, 1e-300), 0.0)
        if np.any(exposure <= 0):  # hours never observed: the mean rate
            rate[exposure <= 0] = counts.sum() / exposure.sum()
    else:
        buckets = 1
        rate = np.array([n / (span / US_PER_HOUR)])
    # Knots at hour boundaries inside the flight; density = rate (per hour) of the bucket.
    first = (int(start) // US_PER_HOUR + 1) * US_PER_HOUR
    inner = np.arange(first, int(end), US_PER_HOUR, dtype=np.int64)
    knots = np.concatenate([[int(start)], inner, [int(end)]]).astype(np.int64)
    seg_hours = np.diff(knots) / US_PER_HOUR
    seg_bucket = (knots[:-1] // US_PER_HOUR) % buckets
    mass = rate[seg_bucket] * seg_hours
    total = float(mass.sum())
    if not total > 0:
        return float(n * (end - start) / span), None
    share = np.concatenate([[0.0], np.cumsum(mass) / total])
    share[-1] = 1.0
    return total, (knots.astype(np.float64), share)


def _bucket_hours(t0: int, t1: int, buckets: int) -> np.ndarray:
    """Hours of each hour-of-period bucket covered by ``[t0, t1)`` (fractional at edges)."""
    out = np.zeros(buckets)
    h0, h1 = int(t0) // US_PER_HOUR, (int(t1) - 1) // US_PER_HOUR
    hours = np.arange(h0, h1 + 1, dtype=np.int64)
    lo = np.maximum(hours * US_PER_HOUR, t0)
    hi = np.minimum((hours + 1) * US_PER_HOUR, t1)
    np.add.at(out, hours % buckets, np.maximum(hi - lo, 0) / US_PER_HOUR)
    return out


# ----------------------------------------------------------------------------- engine


def _placements_of(replay: CampaignArrays, train: CampaignArrays) -> tuple[tuple[str, str], ...]:
    names = replay.placements or train.placements
    p = max(len(names), int(replay.placement_code.max(initial=-1)) + 1,
            int(train.placement_code.max(initial=-1)) + 1)
    pricing = [SECOND_PRICE] * p
    for arr in (train, replay):
        if len(arr):
            fp_codes = np.unique(arr.placement_code[arr.first_price])
            for c in fp_codes:
                pricing[int(c)] = FIRST_PRICE
    return tuple((names[i] if i < len(names) else f"placement_{i}", pricing[i])
                 for i in range(p))


def _max_logged(train: CampaignArrays, p: int) -> np.ndarray:
    # A placement without training prices: every bid there extrapolates (-inf).
    out = np.full(max(p, 1), -np.inf)
    if len(train):
        np.maximum.at(out, train.placement_code.astype(np.int64), train.min_win_price)
    return out


def _identity_tables(train: CampaignArrays, p: int) -> dict[str, np.ndarray]:
    return {"offsets": np.zeros(p + 1, np.int64), "knots_w": np.zeros(1),
            "knots_b": np.zeros(1), "linear": np.zeros(max(p, 1), np.bool_),
            "first_price": np.zeros(max(p, 1), np.bool_),
            "max_logged_price": _max_logged(train, p)}


def _fit_tables(train: CampaignArrays, placements, model: str, tables: Any):
    if tables is None and model != "none":
        from replay.kernels.landscape import fit_shading

        tables = fit_shading(train.min_win_price, train.placement_code, list(placements),
                             model=model)
    if tables is None:
        return None, _identity_tables(train, len(placements)), False
    arrays = {k: np.ascontiguousarray(getattr(tables, k)) for k in
              ("offsets", "knots_w", "knots_b", "linear", "first_price", "max_logged_price")}
    arrays["offsets"] = arrays["offsets"].astype(np.int64)
    arrays["knots_w"] = arrays["knots_w"].astype(np.float64)
    arrays["knots_b"] = arrays["knots_b"].astype(np.float64)
    arrays["linear"] = arrays["linear"].astype(np.bool_)
    arrays["first_price"] = arrays["first_price"].astype(np.bool_)
    arrays["max_logged_price"] = _max_logged(train, len(placements))
    return tables, arrays, True


def _fused_ok(rule: BidRule) -> bool:
    if type(rule).numba_update is None:
        return False
    own = type(rule).update
    return own is BidRule.update or bool(getattr(type(rule), "fused_equivalent", False))


@dataclass
class PreparedReplay:
    """A campaign windowed and its rule fit; ``run()`` replays (again and again)."""

    rule: BidRule
    context: TrainingContext
    rows: CampaignArrays
    run: Any


def replay_campaign(replay: CampaignArrays, train: CampaignArrays, spec: CampaignSpec,
                    rule: BidRule, schedule: Schedule, charges: str = "expected",
                    seed: int = 0, **options: Any) -> CampaignReplay:
    """Replay ``rule`` over ``replay`` (fit on ``train``) with ``spec``'s budget and cap.

    Options (keywords): see ``prepare_replay``.
    """
    return prepare_replay(replay, train, spec, rule, schedule, charges, seed, **options).run()


def prepare_replay(replay: CampaignArrays, train: CampaignArrays, spec: CampaignSpec,
                   rule: BidRule, schedule: Schedule, charges: str = "expected",
                   seed: int = 0, *, shading: str = "empirical", shading_tables: Any = None,
                   window: tuple[int | None, int | None] | None = None,
                   train_window: tuple[int | None, int | None] | None = None,
                   placements: tuple[tuple[str, str], ...] | None = None,
                   path: str = "auto", series_max: int = 20_000,
                   thresholds: bool = True) -> PreparedReplay:
    """Window the rows, fit shading, forecast and the rule; return a runnable replay.

    ``window``: replay window ``(start_us, end_us)``; default the campaign flight
    (``spec.start_us``/``end_us``) or the replay rows' span; both given: their
    intersection. Rows outside are dropped; training rows at or after the window start are
    dropped (no look-ahead). ``train_window``: for the traffic forecast (default first
    training row to window start). ``shading``: ``empirical`` | ``lognormal`` | ``none``
    (tables fit on the training rows; ``shading_tables`` overrides). ``path``: ``auto``
    (compiled loop for built-in rules), ``fused`` or ``generic``. More than ``series_max``
    updates are merged into consecutive buckets in ``series`` (``update`` = the last one).
    ``thresholds``: decide wins from per-row win thresholds computed here once (same
    decisions as shading every row; ``False`` forces the per-row shading loop).
    """
    cid = spec.campaign_id
    if charges not in CHARGE_MODES:
        raise UsageError(f"--charges {charges!r}: allowed: {', '.join(CHARGE_MODES)}")
    if shading not in SHADING_MODELS:
        raise UsageError(f"shading {shading!r}: allowed: {', '.join(SHADING_MODELS)}")
    if path not in ("auto", "fused", "generic"):
        raise UsageError(f"path {path!r}: allowed: auto, fused, generic")
    if not isinstance(schedule, Schedule):
        raise UsageError("schedule must be a replay.engines.campaign.Schedule")
    if not (spec.budget > 0 and math.isfinite(spec.budget)):
        raise UsageError(f"campaign {cid}: budget must be a finite number > 0, got "
                         f"{spec.budget!r}")
    cap = spec.max_cost_per_result
    if cap is not None and not (cap > 0 and math.isfinite(cap)):
        raise UsageError(f"campaign {cid}: max_cost_per_result must be > 0, got {cap!r}")

    w0, w1 = window if window is not None else (None, None)
    start = max(x for x in (w0, spec.start_us) if x is not None) \
        if (w0 is not None or spec.start_us is not None) else None
    end = min(x for x in (w1, spec.end_us) if x is not None) \
        if (w1 is not None or spec.end_us is not None) else None
    if start is None:
        start = int(replay.ts_us[0]) if len(replay) else None
    rows = replay.window(start, end)
    if end is None and len(rows):
        end = int(rows.ts_us[-1]) + 1
    if len(rows) == 0 or start is None or end is None or end <= start:
        raise UsageError(f"campaign {cid}: no auctions in the replay window "
                         f"[{start}, {end}) (microseconds UTC); choose another --start/--end")
    start, end = int(start), int(end)
    train = train.window(None, start)
    t0, t1 = train_window if train_window is not None else (None, None)
    train_start = int(t0) if t0 is not None else (int(train.ts_us[0]) if len(train) else start)
    train_end = min(int(t1), start) if t1 is not None else start

    placements = tuple(placements) if placements is not None else _placements_of(rows, train)
    tables, tab, shade_on = _fit_tables(train, placements, shading, shading_tables)
    expected, curve = traffic_forecast(train.ts_us, train_start, train_end, start, end)
    context = TrainingContext(train=train, spec=spec, placements=placements, start_us=start,
                              end_us=end, train_start_us=train_start, train_end_us=train_end,
                              shading=tables, expected_auctions=expected, traffic_curve=curve)
    rule.fit(context)

    # Everything below depends only on the rows and the landscape: computed once, shared
    # by every run() (a sweep or a benchmark replays the same prepared campaign).
    ts = np.ascontiguousarray(rows.ts_us, np.int64)
    value = np.ascontiguousarray(rows.value, np.float64)
    price = np.ascontiguousarray(rows.min_win_price, np.float64)
    cprob = np.ascontiguousarray(rows.charge_prob, np.float64)
    plc = np.ascontiguousarray(rows.placement_code, np.int32)
    fp = np.ascontiguousarray(rows.first_price, np.bool_)
    shade_args = (tab["offsets"], tab["knots_w"], tab["knots_b"], tab["linear"],
                  tab["first_price"], tab["max_logged_price"],
                  *rl.build_shade_accel(tab["offsets"], tab["knots_w"], tab["knots_b"],
                                        tab["linear"], tab["first_price"]))
    if thresholds:
        fast, need, above_w = rl.win_thresholds(price, plc, fp, shade_on, *shade_args[:6])
        fast = bool(fast)
    else:  # the per-row shading loop reads neither array
        fast, need, above_w = False, np.zeros(0), np.zeros(0)
    use_fused = path == "fused" or (path == "auto" and _fused_ok(rule))
    # The loop build with the per-request stretch, only where the stretch runs: one row per
    # update, win thresholds, no index, series buckets of 2+ rows (more rows than
    # series_max). Its wins compare lambda with a per-row bound (``rl.win_lambdas``: the
    # same decisions as ``w >= need``), computed here once and only for it.
    one_row = (use_fused and fast and schedule.every_n == 1 and not rule.uses_index
               and len(rows) > max(int(series_max), 1))
    theta = (rl.win_lambdas(value, need) if one_row and not rule.fixed_bid
             and bool(np.all(value >= 0.0)) and bool(np.all(need >= 0.0)) else np.zeros(0))
    auctions_per_placement = (np.bincount(plc, minlength=len(placements))[:len(placements)]
                              if len(rows) else np.zeros(len(placements), np.int64))

    def run() -> CampaignReplay:
        """Start the fitted rule afresh and replay (repeatable; used by benchmarks)."""
        n = len(rows)
        state = rule.start(capacity=n) if rule.uses_index else rule.start()
        if state is not None:
            rule.state_ = np.asarray(state, np.float64)
        _check_state(rule, -1)

        if schedule.every_n is not None:
            every_n, every_us = int(schedule.every_n), 0
            k_exp = expected / every_n if math.isfinite(expected) else math.nan
        else:
            every_n, every_us = 0, int(schedule.every_us)
            k_exp = float(math.ceil((end - start) / every_us))
        norm = spec.budget / max(k_exp, 1.0) if math.isfinite(k_exp) else 0.0
        total_k = int(rl.n_intervals(n, every_n, every_us, start, end))
        group = max(1, -(-total_k // max(int(series_max), 1)))
        series = np.zeros((-(-total_k // group), rl.SER_SIZE))

        sampled = charges == "sampled"
        uniforms = np.random.default_rng(seed).random(n) if sampled else np.zeros(0)
        curve_t, curve_f = rule.curve_ if rule.curve_ is not None else context.uniform_curve()
        curve_t = np.ascontiguousarray(curve_t, np.float64)
        curve_f = np.ascontiguousarray(curve_f, np.float64)
        pbid = np.ascontiguousarray(rule.bid_per_placement_, np.float64)
        if rule.fixed_bid and pbid.shape[0] < len(placements):
            raise UsageError(f"rule {rule.name!r}: bid_per_placement_ has {pbid.shape[0]} entries, "
                             f"need {len(placements)}")
        if pbid.shape[0] == 0:
            pbid = np.zeros(1)
        acc = np.zeros(rl.ACC_SIZE)
        acc[rl.ACC_EXHAUSTED_TS] = -1.0
        won = np.zeros(n, np.bool_)
        pl_acc = np.zeros((max(len(placements), 1), 4))
        capf = float(cap) if cap else 0.0
        common = (ts, value, price, cprob, plc, fp, uniforms, sampled, every_n, every_us, start,
                  end, curve_t, curve_f, float(spec.budget), norm, float(expected))
        fb = np.zeros(rl.FB_SIZE)
        tail = (capf, bool(rule.fixed_bid), pbid, shade_on, *shade_args, UNIT, MASK, fast, need,
                above_w, theta, acc, won, pl_acc, series, group, fb)
        if use_fused:
            if not hasattr(type(rule).numba_update, "compile"):
                raise UsageError(f"rule {rule.name!r}: numba_update must be an @njit function "
                                 "(a rule without one runs with path='generic')")
            from replay.kernels.ftl_index import ftl_index_new

            index = rule.index_ if rule.uses_index else ftl_index_new(1)
            _check_update_takes_tuple(rule)
            try:
                rl.replay_fused(type(rule).numba_update, rule.state_,
                                np.ascontiguousarray(rule.params_, np.float64), index,
                                bool(rule.uses_index), *common, *tail, 0, total_k,
                                one_row=one_row)
            except TypingError as exc:
                raise _update_error(rule, exc) from None
            _check_state(rule, total_k - 1)
        else:
            from replay.kernels.ftl_index import ftl_index_new

            dummy = ftl_index_new(1)
            no_params = np.zeros(1)
            for k in range(total_k):
                i = int(acc[rl.ACC_POS])
                state = np.array([rule.lambda_, rule.mu_, np.nan])
                rl.replay_fused(rl.no_update, state, no_params, dummy, False, *common, *tail,
                                k, k + 1)
                j = int(acc[rl.ACC_POS])
                rule.update(IntervalFeedback.from_vector(fb.copy(), _past_rows(value, i, j),
                                                         _past_rows(price, i, j)))
                _check_state(rule, k)
        return _build(cid, rows, placements, spec, rule, acc, won, pl_acc, series, total_k,
                      context, auctions_per_placement)

    return PreparedReplay(rule=rule, context=context, rows=rows, run=run)


#: ``numba_update(state, params, fb)`` as the per-request stretch calls it.
_UPDATE_WITH_TUPLE = (nb_types.float64[::1], nb_types.float64[::1],
                      nb_types.UniTuple(nb_types.float64, rl.FB_SIZE))


def _update_error(rule: BidRule, exc: Exception) -> UsageError:
    first = next((x for x in str(exc).splitlines() if x.strip()), "")
    return UsageError(f"rule {rule.name!r}: its numba_update does not compile in the replay "
                      f"loop, where fb may be a tuple of {rl.FB_SIZE} floats (read it with "
                      f"the FB_* indexes only; state and params are float64 arrays); numba "
                      f"says: {first.strip()}")


def _check_update_takes_tuple(rule: BidRule) -> None:
    """Per-request replays hand the update a tuple: check that it takes one on every
    schedule, so a rule never fails only on long every-request runs."""
    try:
        type(rule).numba_update.compile(_UPDATE_WITH_TUPLE)
    except (TypingError, RuntimeError) as exc:  # RuntimeError: an eager signature
        raise _update_error(rule, exc) from None


def _past_rows(arr: np.ndarray, i: int, j: int) -> np.ndarray:
    """The interval's rows, copied: a view would expose the future rows via ``.base``."""
    return arr[i:j].copy()


def _check_state(rule: BidRule, k: int) -> None:
    lam, mu = rule.lambda_, rule.mu_
    if not (math.isfinite(lam) and lam >= 0 and math.isfinite(mu) and mu >= 0):
        when = "at start" if k < 0 else f"after update {k}"
        raise UsageError(f"rule {rule.name!r}: lambda_={lam!r}, mu_={mu!r} {when}; both must "
                         "be finite and >= 0 (results per currency)")


def _build(cid, rows, placements, spec, rule, acc, won, pl_acc, series, total_k,
           context, counts) -> CampaignReplay:
    spend = float(acc[rl.ACC_SPEND])
    results = float(acc[rl.ACC_RESULTS])
    bids = float(acc[rl.ACC_BIDS])
    ex = acc[rl.ACC_EXHAUSTED_TS]
    totals: dict[str, object] = {
        "campaign_id": cid, "rule": rule.name, "auctions": len(rows),
        "wins": int(acc[rl.ACC_WINS]), "results": results, "spend": spend,
        "expected_spend": float(acc[rl.ACC_EXPECTED]),
        "cost_per_result": spend / results if results > 0 else math.nan,
        "min_price_cost": float(acc[rl.ACC_MIN_COST]), "budget": float(spec.budget),
        "budget_used": spend / float(spec.budget),
        "exhausted_at_us": int(ex) if ex >= 0 else None,
        "last_charge": float(acc[rl.ACC_LAST_CHARGE]),
        "bids_above_logged": float(acc[rl.ACC_ABOVE] / bids) if bids > 0 else 0.0,
        "lambda_final": rule.lambda_, "mu_final": rule.mu_,
        "max_cost_per_result": spec.max_cost_per_result, "updates": int(total_k),
        "start_us": int(context.start_us), "end_us": int(context.end_us),
        "train_rows": len(context.train),
        "expected_auctions": float(context.expected_auctions),
        "cold_start_source": getattr(rule, "cold_start_source_", None),
        "lambda0": getattr(rule, "lambda0_", None),
    }
    s = series
    ser = pl.DataFrame({
        "update": s[:, rl.SER_UPDATE].astype(np.int64),
        "ts_us": s[:, rl.SER_TS].astype(np.int64),
        "lambda": s[:, rl.SER_LAMBDA], "mu": s[:, rl.SER_MU],
        "auctions": s[:, rl.SER_AUCTIONS].astype(np.int64),
        "wins": s[:, rl.SER_WINS].astype(np.int64),
        "results": s[:, rl.SER_RESULTS], "spend": s[:, rl.SER_SPEND],
        "expected_spend": s[:, rl.SER_EXPECTED], "target_spend": s[:, rl.SER_TARGET],
        "cum_spend": s[:, rl.SER_CUM_SPEND], "cum_target": s[:, rl.SER_CUM_TARGET],
    }).with_columns(
        win_rate=pl.when(pl.col("auctions") > 0)
        .then(pl.col("wins") / pl.col("auctions")).otherwise(None))
    present = np.flatnonzero(counts > 0)
    plc = pl.DataFrame({
        "placement": [placements[i][0] for i in present],
        "pricing": [placements[i][1] for i in present],
        "auctions": counts[present].astype(np.int64),
        "wins": pl_acc[present, 0].astype(np.int64),
        "results": pl_acc[present, 1], "spend": pl_acc[present, 2],
        "expected_spend": pl_acc[present, 3],
    }, schema={"placement": pl.String, "pricing": pl.String, "auctions": pl.Int64,
               "wins": pl.Int64, "results": pl.Float64, "spend": pl.Float64,
               "expected_spend": pl.Float64})
    return CampaignReplay(cid, totals, ser, plc, won, rule)
