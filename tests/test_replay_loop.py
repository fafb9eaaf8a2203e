"""Replay loop semantics, fused vs generic path, schedules, budget enforcement."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy import stats

from replay.engines import campaign as engine
from replay.engines.campaign import Schedule, replay_campaign
from replay.errors import UsageError
from replay.kernels import replay_loop as rl
from replay.kernels.landscape import fit_shading, shade_many
from replay.rules.registry import list_rules, make_rule
from replay.schema import CampaignArrays, CampaignSpec
from replay.testing import check_rule, contract_data

HOUR = 3_600_000_000
T0 = 1_700_006_400_000_000


def _split(data: CampaignArrays):
    cut = T0 + 2 * 24 * HOUR
    return data.window(None, cut), data.window(cut, None)


def _naive(value, price, cprob, fp, bids, budget, uniforms=None):
    """A plain-Python replay straight from the issue text (Engine item 1)."""
    spend = 0.0
    won = np.zeros(len(value), bool)
    results = 0.0
    for r in range(len(value)):
        if spend >= budget:
            break
        b = bids[r]
        if b >= price[r]:
            paid = b if fp[r] else price[r]
            charge = paid
            if uniforms is not None:
                charge = paid / cprob[r] if uniforms[r] < cprob[r] else 0.0
            won[r] = True
            spend += charge
            results += value[r]
    return won, spend, results


def test_second_price_best_response_is_budget_adjusted_value() -> None:
    # Source: Vickrey (1961): in a second-price auction bidding one's value is dominant, so
    # the best response bid is w = value / lambda and the win set is {value * m >= price}.
    data = contract_data(n=4000)
    second = data.slice(0, len(data))
    second = CampaignArrays("c", second.ts_us, second.value, second.min_win_price,
                            second.charge_prob, second.placement_code,
                            np.zeros(len(second), bool), second.placements)
    train, replay = _split(second)
    m = float(np.median(replay.min_win_price / np.maximum(replay.value, 1e-9)))
    out = replay_campaign(replay, train, CampaignSpec("c", budget=1e9),
                          make_rule("fixed-multiplier", {"multiplier": m}),
                          Schedule(every_us=HOUR))
    expect = replay.value * (1.0 / (1.0 / m)) >= replay.min_win_price
    assert np.array_equal(out.won, expect)
    assert out.totals["spend"] == pytest.approx(replay.min_win_price[expect].sum(), rel=1e-12)
    assert out.totals["results"] == pytest.approx(replay.value[expect].sum(), rel=1e-12)


@pytest.mark.parametrize("charges", ["expected", "sampled"])
@pytest.mark.parametrize("shading", ["none", "empirical"])
def test_loop_matches_naive_replay(charges: str, shading: str) -> None:
    data = contract_data(n=5000, seed=8)
    train, replay = _split(data)
    budget = 0.03 * float(replay.min_win_price.sum())
    m = 2.0 * float(np.median(replay.min_win_price / np.maximum(replay.value, 1e-9)))
    rule = make_rule("fixed-multiplier", {"multiplier": m})
    out = replay_campaign(replay, train, CampaignSpec("c", budget=budget), rule,
                          Schedule(every_n=100), charges, seed=4, shading=shading)
    w = replay.value * (1.0 / rule.lambda_)
    bids = w.copy()
    if shading != "none":
        tables = fit_shading(train.min_win_price, train.placement_code,
                             [("feed", "second_price"), ("partner", "first_price")])
        shaded = shade_many(w, replay.placement_code, tables)
        bids = np.where(replay.first_price, np.minimum(shaded, w), w)
    u = np.random.default_rng(4).random(len(replay)) if charges == "sampled" else None
    won, spend, results = _naive(replay.value, replay.min_win_price, replay.charge_prob,
                                 replay.first_price, bids, budget, u)
    assert np.array_equal(out.won, won)
    assert out.totals["spend"] == pytest.approx(spend, rel=1e-12)
    assert out.totals["results"] == pytest.approx(results, rel=1e-12)
    assert out.totals["exhausted_at_us"] is not None  # the budget is tight here
    pl = out.placements
    assert pl["wins"].sum() == out.totals["wins"] == won.sum()
    assert pl["auctions"].sum() == len(replay)


def test_sampled_charges_are_unbiased() -> None:
    # Source: a Bernoulli(q) charge of price/q has mean price and variance
    # price^2 (1 - q) / q; the total over independent rows is ~ normal (CLT).
    data = contract_data(n=6000, seed=2)
    train, replay = _split(data)
    rule = make_rule("fixed-multiplier", {"multiplier": 1e6})  # wins everything
    spec = CampaignSpec("c", budget=1e12)
    exp = replay_campaign(replay, train, spec, rule, Schedule(every_n=500), "expected")
    samp = replay_campaign(replay, train, spec, make_rule("fixed-multiplier",
                           {"multiplier": 1e6}), Schedule(every_n=500), "sampled", seed=9)
    assert samp.totals["expected_spend"] == pytest.approx(exp.totals["spend"], rel=1e-12)
    paid = np.where(replay.first_price, 1e6 * replay.value, replay.min_win_price)
    won = exp.won
    var = float(np.sum(paid[won] ** 2 * (1 - replay.charge_prob[won]) / replay.charge_prob[won]))
    z = (samp.totals["spend"] - exp.totals["spend"]) / math.sqrt(var)
    assert abs(z) < stats.norm.ppf(1 - 1e-4)


_SCHEDULES = {"hourly": Schedule(every_us=HOUR), "every37": Schedule(every_n=37),
              "every1": Schedule(every_n=1)}
# every1: the fused loop runs one-row intervals in its per-request stretch (series buckets
# of several updates, series_max below); the generic path never does. The stretch is the
# same code for every rule, and each update function costs a compile of that loop build
# (about 9 s): two updates here (fixed_update serves both fixed rules; ftl has no stretch).
_PATH_CASES = [(cls, name) for cls in list_rules() for name in ("hourly", "every37")] + [
    (cls, "every1") for cls in list_rules()
    if cls.name in ("fixed-multiplier", "fixed-bid", "ftl", "dual-mirror")]


@pytest.mark.parametrize(("cls", "schedule_name"), _PATH_CASES,
                         ids=[f"{name}-{cls.name}" for cls, name in _PATH_CASES])
def test_fused_and_generic_paths_identical(cls, schedule_name) -> None:
    schedule = _SCHEDULES[schedule_name]
    data = contract_data(n=5000, seed=5)
    train, replay = _split(data)
    spec = CampaignSpec("c", budget=0.05 * float(replay.min_win_price.sum()),
                        max_cost_per_result=0.05)
    a = replay_campaign(replay, train, spec, cls(), schedule, "sampled", 3, path="fused",
                        series_max=97)
    b = replay_campaign(replay, train, spec, cls(), schedule, "sampled", 3, path="generic",
                        series_max=97)
    assert np.array_equal(a.won, b.won)
    assert a.series.equals(b.series)
    for key, x in a.totals.items():
        y = b.totals[key]
        assert x == y or (isinstance(x, float) and math.isnan(x) and math.isnan(y)), key


def test_schedule_boundaries() -> None:
    data = contract_data(n=3000, seed=1)
    train, replay = _split(data)
    spec = CampaignSpec("c", budget=1e9)
    start, end = int(replay.ts_us[0]), int(replay.ts_us[-1]) + 1
    out = replay_campaign(replay, train, spec, make_rule("dual-mirror"),
                          Schedule(every_us=HOUR), window=(start, end))
    assert out.series.height == math.ceil((end - start) / HOUR)
    edges = start + HOUR * np.arange(1, out.series.height + 1)
    edges[-1] = end
    assert np.array_equal(out.series["ts_us"].to_numpy(), edges)
    counts = np.diff(np.searchsorted(replay.ts_us, np.concatenate([[start], edges])))
    assert np.array_equal(out.series["auctions"].to_numpy(), counts)
    out = replay_campaign(replay, train, spec, make_rule("dual-mirror"), Schedule(every_n=100))
    a = out.series["auctions"].to_numpy()
    assert np.all(a[:-1] == 100) and 0 < a[-1] <= 100 and a.sum() == len(replay)
    # uniform target curve: the targets add up to the budget
    assert out.series["target_spend"].sum() == pytest.approx(1e9, rel=1e-9)


def test_series_buckets_when_updates_exceed_series_max() -> None:
    data = contract_data(n=3000, seed=1)
    train, replay = _split(data)
    # dual-mirror: its per-request loop build is compiled for other tests already
    out = replay_campaign(replay, train, CampaignSpec("c", budget=1.0),
                          make_rule("dual-mirror"), Schedule(every_n=1), series_max=100)
    assert out.series.height <= 100
    assert out.series["auctions"].sum() == len(replay)
    assert out.totals["updates"] == len(replay)


@settings(max_examples=30, deadline=None)
@given(frac=st.floats(1e-4, 0.8), every_n=st.integers(1, 400),
       rule=st.sampled_from([c.name for c in list_rules()]),
       charges=st.sampled_from(["expected", "sampled"]), seed=st.integers(0, 3))
def test_spend_never_exceeds_budget_plus_one_row(frac, every_n, rule, charges, seed) -> None:
    # Property from the issue: no bids once the budget is spent, at most one row over.
    data = contract_data(n=1500, seed=seed)
    train, replay = _split(data)
    budget = frac * float(replay.min_win_price.sum())
    out = replay_campaign(replay, train, CampaignSpec("c", budget=budget), make_rule(rule),
                          Schedule(every_n=every_n), charges, seed)
    spend, last = out.totals["spend"], out.totals["last_charge"]
    assert spend - last < budget or spend == 0.0
    if spend >= budget:
        # after exhaustion, no row wins
        t = out.totals["exhausted_at_us"]
        assert not out.won[replay.ts_us > t].any()


def test_poison_check_catches_a_leak(monkeypatch) -> None:
    # The no-look-ahead check must fail when the engine leaks future rows to a rule.
    import textwrap
    import types

    code = textwrap.dedent('''
        from replay.rules.base import BidRule

        class Peek(BidRule):
            name = "peek"
            def start(self):
                self.lambda_ = 50.0
                return self.state_
            def update(self, feedback):
                self.lambda_ = 50.0 + float(feedback.value.sum())
    ''')
    mod = types.ModuleType("peek_mod")
    exec(code, mod.__dict__)
    check_rule(mod.Peek)  # honest engine: passes
    monkeypatch.setattr(engine, "_past_rows", lambda arr, i, j: arr[i:].copy())
    with pytest.raises(AssertionError, match="look-ahead"):
        check_rule(mod.Peek)


@pytest.mark.parametrize("eager", [False, True], ids=["lazy", "eager-signature"])
def test_numba_update_that_treats_fb_as_an_array_gets_one_clear_line(eager: bool) -> None:
    from numba import njit

    from replay.rules.base import BidRule

    def sized(state, params, fb):
        state[0] = state[0] * fb.shape[0] / rl.FB_SIZE  # fb may be a tuple in the loop

    sized_update = njit("void(float64[::1], float64[::1], float64[::1])")(sized) if eager \
        else njit(sized)

    class Sized(BidRule):
        name = "sized"
        numba_update = sized_update

        def start(self):
            self.state_ = np.array([1.0, 0.0, np.nan])
            return self.state_

    data = contract_data(n=500)
    train, replay = _split(data)
    with pytest.raises(UsageError, match=r"rule .sized.: its numba_update .* tuple of 20"):
        replay_campaign(replay, train, CampaignSpec("c", budget=1.0), Sized(),
                        Schedule(every_n=10))


def test_bad_input_errors() -> None:
    data = contract_data(n=500)
    train, replay = _split(data)
    spec = CampaignSpec("c", budget=1.0)
    rule = make_rule("dual-gradient")
    with pytest.raises(UsageError, match="no auctions in the replay window"):
        replay_campaign(replay, train, spec, rule, Schedule(every_n=10),
                        window=(T0 + 100 * 24 * HOUR, T0 + 101 * 24 * HOUR))
    with pytest.raises(UsageError, match="--charges 'exact'"):
        replay_campaign(replay, train, spec, rule, Schedule(every_n=10), "exact")
    with pytest.raises(UsageError, match="exactly one"):
        Schedule(every_us=10, every_n=10)
    with pytest.raises(UsageError, match="> 0"):
        Schedule(every_n=0)
    with pytest.raises(UsageError, match="not a duration"):
        Schedule.parse("fast")
    assert Schedule.parse("15min").every_us == 900_000_000
    assert Schedule.parse(None, 1000).every_n == 1000
    with pytest.raises(UsageError, match="budget"):
        replay_campaign(replay, train, CampaignSpec("c", budget=-1.0), rule,
                        Schedule(every_n=10))


@settings(max_examples=50, deadline=None)
@given(seed=st.integers(0, 10_000), model=st.sampled_from(["empirical", "lognormal"]))
# A log-normal table whose last segment is flat: shade(inf) once gave NaN (0 * inf).
@example(seed=1197, model="lognormal")
def test_grid_shading_equals_shade(seed: int, model: str) -> None:
    # The loop's grid accelerator must return exactly what landscape.shade returns.
    from replay.kernels.bits import MASK
    from replay.kernels.landscape import shade
    from replay.kernels.replay_loop import build_shade_accel, shade_fast

    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 3000))
    prices = rng.lognormal(-6, float(rng.uniform(0.1, 3.0)), n)
    prices[rng.random(n) < 0.1] = 0.0
    codes = rng.integers(0, 3, n).astype(np.int32)
    tables = fit_shading(prices, codes, [("a", "first_price"), ("b", "second_price"),
                                         ("c", "first_price")], model=model)
    acc = build_shade_accel(tables.offsets, tables.knots_w, tables.knots_b, tables.linear,
                            tables.first_price)
    args = (tables.offsets, tables.knots_w, tables.knots_b, tables.linear, tables.first_price)
    ws = np.concatenate([rng.lognormal(-6, 3, 300), tables.knots_w,
                         np.nextafter(tables.knots_w, 0), np.nextafter(tables.knots_w, 1),
                         [0.0, 1e300, np.inf]])
    for p in range(3):
        for w in ws:
            assert shade_fast(w, p, *args, *acc, MASK) == min(shade(w, p, *args), w), (w, p)


@pytest.mark.parametrize("prices", [
    # Many knots in one grid cell: the lookup's rare scan past the cell's second knot.
    1.0 + np.arange(400) * 1e-6,
    # Knots over ~1,800 octaves: too wide for a grid, the placement falls back to shade.
    np.geomspace(1e-280, 1e270, 200),
    # Only zero prices: no positive knot to build a grid on.
    np.zeros(50),
])
def test_grid_shading_equals_shade_on_hard_tables(prices: np.ndarray) -> None:
    from replay.kernels.bits import MASK
    from replay.kernels.landscape import shade

    codes = np.zeros(len(prices), np.int32)
    tables = fit_shading(prices, codes, [("a", "first_price")], model="empirical")
    grid, rec, gidx = rl.build_shade_accel(tables.offsets, tables.knots_w, tables.knots_b,
                                           tables.linear, tables.first_price)
    args = (tables.offsets, tables.knots_w, tables.knots_b, tables.linear, tables.first_price)
    kw = tables.knots_w[np.isfinite(tables.knots_w)]
    ws = np.concatenate([kw, np.nextafter(kw, 0), np.nextafter(kw, np.inf), prices,
                         [0.0, 1e-300, 1e300, np.inf]])
    rare = 0
    for w in ws:
        assert rl.shade_fast(w, 0, *args, grid, rec, gidx, MASK) == min(shade(w, 0, *args), w)
        if grid[0, rl.G_SLOW] == 0:
            cell = min(max((int(np.float64(w).view(np.int64)) >> rl._KEY_SHIFT)
                           - grid[0, rl.G_KMIN], 0), grid[0, rl.G_NCELL])
            rare += bool(w > rec[cell, rl.R_NEXT])
    expect_slow = prices.max() > 1e100 or prices.max() == 0.0
    assert grid[0, rl.G_SLOW] == expect_slow
    if prices.max() == 1.0 + 399e-6:
        assert rare > 100  # the scan path really ran


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), m=st.floats(1e-3, 1e3))
def test_win_thresholds_match_shading_every_row(seed: int, m: float) -> None:
    """w >= need[row] iff the shaded bid b(w) reaches the row's price, and w > above_w[p]
    iff b(w) exceeds the logged maximum: the threshold path decides exactly as shading
    every row (internal consistency of the monotone step best response)."""
    from replay.engines.campaign import _fit_tables
    from replay.kernels import replay_loop as rl

    rng = np.random.default_rng(seed)
    data = contract_data(n=3000, seed=seed % 1000)
    train, rows = _split(data)
    placements = engine._placements_of(rows, train)
    tables, tab, _ = _fit_tables(train, placements, "empirical", None)
    args = (tab["offsets"], tab["knots_w"], tab["knots_b"], tab["linear"], tab["first_price"],
            tab["max_logged_price"])
    plc = rows.placement_code.astype(np.int32)
    ok, need, above_w = rl.win_thresholds(rows.min_win_price, plc, rows.first_price, True,
                                          *args)
    assert ok
    w = rows.value * m * rng.uniform(0.5, 2.0, len(rows))
    # Exact knots as values of w, where the steps change.
    w[: min(50, len(w))] = rng.choice(tab["knots_w"], min(50, len(w)))
    bid = np.minimum(shade_many(w, plc, tables), w)
    bid = np.where(rows.first_price, bid, w)
    assert np.array_equal(w >= need, bid >= rows.min_win_price)
    assert np.array_equal(w > above_w[plc], bid > tab["max_logged_price"][plc])


@pytest.mark.parametrize("rule", ["fixed-multiplier", "dual-mirror", "ftl", "fixed-bid"])
@pytest.mark.parametrize("charges", ["expected", "sampled"])
# every_n=2500: intervals span several of the fast path's chunks (rl.WIN_CHUNK rows);
# every_n=1: one-row intervals, in the per-request stretch between series buckets.
@pytest.mark.parametrize("every_n", [1, 97, 2500])
def test_threshold_path_identical_to_per_row_shading(rule: str, charges: str,
                                                     every_n: int) -> None:
    """The loop with win thresholds returns bit-identical totals, series and wins to the
    loop that shades every row (both are the same replay; the first is faster)."""
    data = contract_data(n=6000)
    train, rows = _split(data)
    spec = CampaignSpec("c", budget=0.3 * float(rows.min_win_price.sum()))
    out = [engine.prepare_replay(rows, train, spec, make_rule(rule, {}),
                                 Schedule(every_n=every_n), charges, 3, series_max=200,
                                 thresholds=flag).run() for flag in (True, False)]
    _assert_same_replay(*out)


@pytest.mark.parametrize("charges", ["expected", "sampled"])
def test_threshold_path_identical_when_budget_runs_out_mid_chunk(charges: str) -> None:
    """The budget runs out inside the second chunk of a long interval: the fast path stops
    there and counts bids and extrapolated bids only up to that row, as the per-row loop."""
    data = contract_data(n=6000)
    train, rows = _split(data)
    every_n = 2500
    assert len(rows) > every_n > 2 * rl.WIN_CHUNK
    rule = {"multiplier": 1e6}  # wins nearly every row: spend grows with the row index

    def run(budget: float, thresholds: bool):
        return engine.prepare_replay(rows, train, CampaignSpec("c", budget=budget),
                                     make_rule("fixed-multiplier", rule),
                                     Schedule(every_n=every_n), charges, 3,
                                     thresholds=thresholds).run()

    first = float(run(1e12, True).series["spend"][0])  # the first interval, unconstrained
    fast, slow = run(0.6 * first, True), run(0.6 * first, False)
    row = int(np.searchsorted(rows.ts_us, fast.totals["exhausted_at_us"]))
    assert rl.WIN_CHUNK < row < every_n
    assert 0 < fast.totals["bids_above_logged"] < 1
    _assert_same_replay(fast, slow)


@pytest.mark.parametrize("charges", ["expected", "sampled"])
def test_per_request_stretch_stops_where_the_budget_runs_out(charges: str) -> None:
    """One row per update, the budget spent inside a series bucket: the fused loop's
    per-request stretch stops at that row exactly as the generic path (which never enters
    the stretch) and the loop that shades every row."""
    data = contract_data(n=6000)
    train, rows = _split(data)
    rule = {"multiplier": 1e6}  # wins nearly every row: spend grows with the row index

    def run(budget: float, **options):
        return engine.prepare_replay(rows, train, CampaignSpec("c", budget=budget),
                                     make_rule("fixed-multiplier", rule), Schedule(every_n=1),
                                     charges, 3, series_max=50, **options).run()

    budget = 0.55 * float(run(1e12).totals["spend"])
    fused = run(budget)
    group = -(-len(rows) // 50)
    row = int(np.searchsorted(rows.ts_us, fused.totals["exhausted_at_us"]))
    assert len(rows) // 3 < row < len(rows) - group and (row + 1) % group != 0
    _assert_same_replay(fused, run(budget, path="generic"))
    _assert_same_replay(fused, run(budget, thresholds=False))


def _assert_same_replay(fast, slow) -> None:
    assert fast.totals == slow.totals
    assert fast.series.equals(slow.series)
    assert np.array_equal(fast.won, slow.won)
    assert fast.placements.equals(slow.placements)


def test_feedback_tuple_puts_each_field_at_its_index() -> None:
    """The fused loop hands updates ``feedback_tuple(...)``; rules index it with ``FB_*``."""
    names = {"k": rl.FB_K, "auctions": rl.FB_AUCTIONS, "wins": rl.FB_WINS,
             "results": rl.FB_RESULTS, "spend": rl.FB_SPEND, "expected": rl.FB_EXPECTED_SPEND,
             "target": rl.FB_TARGET, "cum": rl.FB_CUM_SPEND, "cum_e": rl.FB_CUM_EXPECTED,
             "cum_target": rl.FB_CUM_TARGET, "cum_r": rl.FB_CUM_RESULTS,
             "remaining": rl.FB_REMAINING, "t_start": rl.FB_T_START, "t_end": rl.FB_T_END,
             "budget": rl.FB_BUDGET, "remaining_share": rl.FB_REMAINING_SHARE,
             "rows_seen": rl.FB_ROWS_SEEN, "norm": rl.FB_NORM, "exhausted": rl.FB_EXHAUSTED,
             "expected_auctions": rl.FB_EXPECTED_AUCTIONS}
    assert sorted(names.values()) == list(range(rl.FB_SIZE))
    values = {name: 10.0 + i for i, name in enumerate(names)}
    out = rl.feedback_tuple(**values)
    assert len(out) == rl.FB_SIZE
    for name, index in names.items():
        assert out[index] == values[name], name


def _wins_at(v: float, nd: float, lam: float) -> bool:
    """The loop's win test with mu = 0, in plain Python floats (IEEE-754 doubles)."""
    return v * (1.0 / max(lam, rl.LAMBDA_FLOOR)) >= nd


@settings(max_examples=200, deadline=None)
@given(value=st.floats(0.0, 1e6, allow_subnormal=True),
       need=st.one_of(st.floats(0.0, 1e6, allow_subnormal=True), st.just(math.inf)),
       lam=st.one_of(st.floats(-1.0, 1e300), st.just(math.inf), st.just(0.0)))
@example(value=1.0, need=0.0, lam=math.inf)
@example(value=0.0, need=0.0, lam=1e300)
@example(value=1e-300, need=1e-300, lam=1.0)
@example(value=3.0, need=5e-324, lam=1.7976931348623157e308)
@example(value=5e-324, need=5e-324, lam=1.5)  # subnormal: theta ~2**52 ulps from v/need
def test_win_lambdas_decide_exactly_as_the_bid_compare(value: float, need: float,
                                                       lam: float) -> None:
    """``lam <= theta`` is the loop's win test ``value * (1 / max(lam, floor)) >= need``
    bit for bit, at any lambda and at the floats on either side of theta (correctly
    rounded division and product are monotone: IEEE 754-2008, section 4.3)."""
    theta = float(rl.win_lambdas(np.array([value]), np.array([need]))[0])
    probes = [lam, theta, math.nextafter(theta, math.inf), math.nextafter(theta, -math.inf),
              rl.LAMBDA_FLOOR, 0.0, math.inf]
    for x in probes:
        if math.isfinite(x) or x == math.inf:
            assert (x <= theta) == _wins_at(value, need, x), (value, need, theta, x)


def test_win_lambdas_on_many_rows_at_theta_and_its_neighbours() -> None:
    """The same equivalence over 200,000 rows of spread values and needs (numpy's float64
    division and product are IEEE-754 correctly rounded, as the loop's)."""
    rng = np.random.default_rng(11)
    n = 200_000
    value = rng.lognormal(0.0, 3.0, n)
    need = rng.lognormal(-1.0, 3.0, n)
    need[::97] = 0.0
    need[::89] = np.inf
    value[::83] = 0.0
    theta = rl.win_lambdas(value, need)

    def wins(lam):
        return value * (1.0 / np.maximum(lam, rl.LAMBDA_FLOOR)) >= need

    finite = np.isfinite(theta)
    for lam in (theta, np.nextafter(theta, np.inf), np.nextafter(theta, -np.inf),
                rng.lognormal(0.0, 3.0, n)):
        lam = np.where(np.isfinite(lam), lam, 1.0)
        assert np.array_equal(lam <= theta, wins(lam))
    assert finite.mean() > 0.9  # most rows have a finite boundary


def test_curve_shares_equal_curve_from_row_by_row() -> None:
    """The per-request stretch's block evaluation of the target curve returns what
    ``_curve_from`` returns row by row, bit for bit, across segments, flat runs and rows
    before and after the curve."""
    rng = np.random.default_rng(4)
    knots = np.sort(rng.uniform(1e6, 9e6, 40))
    knots[10] = knots[9]  # a zero-length segment
    curve_t = knots
    curve_f = np.sort(rng.uniform(0.0, 1.0, 40))
    curve_f[20:23] = curve_f[19]  # a flat stretch
    knots[5] = float(int(knots[5]))
    ts = rng.integers(0, 10_000_000, 5000)
    ts[100:140] = int(knots[5])  # rows exactly on a knot
    ts = np.sort(ts).astype(np.int64)
    for start, count, pos in ((0, 5000, 0), (1, 1024, 0), (3000, 2000, 0), (4999, 1, 0)):
        out = np.empty(count)
        out_pos = np.empty(count, np.int64)
        p_pos = int(rl._curve_shares(ts, start, count, curve_t, curve_f, pos, out, out_pos))
        want, want_pos, q = np.empty(count), np.empty(count, np.int64), pos
        for u in range(count):
            want[u], q = rl._curve_from(float(ts[start + u]), curve_t, curve_f, q)
            want_pos[u] = q
        assert np.array_equal(out, want)
        assert np.array_equal(out_pos, want_pos) and p_pos == q


@pytest.mark.parametrize("target", ["uniform", "traffic"])
def test_long_per_request_stretch_with_a_cap_matches_generic_path(target: str) -> None:
    """Per-request stretches longer than the stretch's chunk (rl.WIN_CHUNK rows), a target
    curve with many knots and a cost-per-result cap whose multiplier moves between 0 and
    positive values (so wins switch between ``lam <= theta`` and ``w >= need``):
    bit-identical to the generic path, which runs every row through the interval body."""
    data = contract_data(n=8000, seed=7)
    train, rows = _split(data)
    spec = CampaignSpec("c", budget=0.3 * float(rows.min_win_price.sum()),
                        max_cost_per_result=0.1)

    def run(path: str, series_max: int):
        return replay_campaign(rows, train, spec, make_rule("dual-mirror", {"target": target}),
                               Schedule(every_n=1), "expected", 3, path=path,
                               series_max=series_max)

    mu = run("fused", 5000).series["mu"].to_numpy()
    assert np.any(mu == 0) and np.any(mu > 0)
    assert -(-len(rows) // 2) > rl.WIN_CHUNK
    _assert_same_replay(run("fused", 2), run("generic", 2))
