"""The contract every bid rule passes (built-in or a user's own class).

    from replay.testing import check_rule
    check_rule(MyRule, step=0.1)   # raises AssertionError naming the broken promise

Checks, on a small seeded synthetic campaign (two placements, first and second price,
click billing with charge_prob < 1):
1. parameters: ``get_params()`` round-trips through the constructor; an unknown
   parameter raises ``UsageError``;
2. budget: spend <= budget + one row's charge, for both charge modes and both schedules;
3. lambda_ and mu_ finite and >= 0 after every update (the engine also enforces this);
4. determinism: two replays give bit-identical totals, series and won rows;
5. no look-ahead: rows after a decision time are poisoned (huge values, zero or huge
   prices, other charge probabilities); every decision before it and every row outcome
   before it are bit-identical;
6. no training rows: the rule still runs and keeps the budget.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from replay.errors import UsageError
from replay.schema import US_PER_DAY, US_PER_HOUR, CampaignArrays, CampaignSpec

T0_US = 1_700_006_400_000_000  # an invented Monday 00:00 UTC-ish origin


def contract_data(n: int = 6000, days: float = 4.0, seed: int = 3) -> CampaignArrays:
    """A small synthetic campaign: ``days`` of traffic with a daily cycle, two placements
    (0: second price, 1: first price), charge_prob in (0.2, 1]."""
    rng = np.random.default_rng(seed)
    span = int(days * US_PER_DAY)
    # Daily cycle: accept times with probability ~ 1 + 0.8 sin(hour).
    t = rng.integers(0, span, 3 * n)
    keep = rng.random(3 * n) < (1 + 0.8 * np.sin(2 * np.pi * (t % (US_PER_DAY))
                                                 / (US_PER_DAY))) / 1.8
    ts = np.sort(t[keep][:n]).astype(np.int64) + T0_US
    m = ts.shape[0]
    plc = rng.integers(0, 2, m).astype(np.int32)
    value = rng.gamma(2.0, 0.01, m)
    value[rng.random(m) < 0.05] = 0.0
    price = rng.lognormal(-6.0, 0.9, m)
    price[rng.random(m) < 0.02] = 0.0
    cprob = rng.uniform(0.2, 1.0, m)
    return CampaignArrays("contract", ts, value, price, cprob, plc, plc == 1,
                          ("feed", "partner"))


def _replay(rule_cls, params, replay, train, spec, schedule, charges, seed=0):
    from replay.engines.campaign import replay_campaign

    return replay_campaign(replay, train, spec, rule_cls(**params), schedule, charges, seed)


def _same(a, b, what: str) -> None:
    ta = {k: v for k, v in a.totals.items()}
    tb = {k: v for k, v in b.totals.items()}
    for key in ta:
        x, y = ta[key], tb[key]
        if isinstance(x, float) and math.isnan(x) and isinstance(y, float) and math.isnan(y):
            continue
        assert x == y, f"{what}: totals[{key!r}] differ: {x!r} != {y!r}"
    assert a.series.equals(b.series), f"{what}: series differ"
    assert np.array_equal(a.won, b.won), f"{what}: won rows differ"


def check_rule(rule_cls: type, **params: Any) -> dict[str, object]:
    """Run the contract checks on ``rule_cls(**params)``; returns a small summary dict.

    Raises AssertionError (with the broken promise) or the rule's own error."""
    from replay.engines.campaign import Schedule

    summary: dict[str, object] = {"rule": getattr(rule_cls, "name", rule_cls.__name__)}
    # 1. parameters
    rule = rule_cls(**params)
    again = rule_cls(**rule.get_params())
    assert again.get_params() == rule.get_params(), "get_params() does not round-trip"
    try:
        rule_cls(**params, no_such_parameter_xyz=1)
    except UsageError:
        pass
    else:
        raise AssertionError("an unknown parameter must raise replay.errors.UsageError")

    data = contract_data()
    cut = T0_US + 2 * US_PER_DAY
    train, replay = data.window(None, cut), data.window(cut, None)
    spend_scale = float(replay.min_win_price.sum())
    schedules = (Schedule(every_us=US_PER_HOUR), Schedule(every_n=97))
    runs = 0
    # 2 + 3. budget and multipliers, tight and loose budgets, both charge modes
    for frac in (0.002, 0.05, 0.5):
        spec = CampaignSpec("contract", budget=frac * spend_scale)
        for schedule in schedules:
            for charges in ("expected", "sampled"):
                out = _replay(rule_cls, params, replay, train, spec, schedule, charges, 5)
                runs += 1
                # Bids stop once spend >= budget, so the spend before the last won
                # row is below the budget: spend <= budget + one row's charge.
                last = out.totals["last_charge"]
                assert out.totals["spend"] - last < spec.budget or out.totals["spend"] == 0, \
                    f"spend {out.totals['spend']} > budget {spec.budget} + one row " \
                    f"({last}) ({schedule}, {charges})"
                lam = out.series["lambda"].to_numpy()
                mu = out.series["mu"].to_numpy()
                assert np.all(np.isfinite(lam)) and np.all(lam >= 0), "lambda not finite/>=0"
                assert np.all(np.isfinite(mu)) and np.all(mu >= 0), "mu not finite/>=0"
    # 4. determinism
    spec = CampaignSpec("contract", budget=0.05 * spend_scale)
    for schedule in schedules:
        a = _replay(rule_cls, params, replay, train, spec, schedule, "sampled", 11)
        b = _replay(rule_cls, params, replay, train, spec, schedule, "sampled", 11)
        _same(a, b, f"determinism ({schedule})")
        runs += 2
    # 5. no look-ahead
    for schedule in schedules:
        base = _replay(rule_cls, params, replay, train, spec, schedule, "expected")
        ser = base.series
        k_cut = max(1, ser.height // 2)
        t_dec = int(ser["ts_us"][k_cut - 1])  # decision time at the end of update k_cut-1
        if schedule.every_n is not None:
            row_cut = int(ser["auctions"][:k_cut].sum())
        else:
            row_cut = int(np.searchsorted(replay.ts_us, t_dec, "left"))
        for poison in _poisons(replay, row_cut):
            out = _replay(rule_cls, params, poison, train, spec, schedule, "expected")
            assert np.array_equal(out.won[:row_cut], base.won[:row_cut]), \
                f"no look-ahead ({schedule}): outcomes before the decision changed"
            for col in ("lambda", "mu", "spend", "wins"):
                x = out.series[col].to_numpy()[:k_cut + 1]
                y = ser[col].to_numpy()[:k_cut + 1]
                if col in ("spend", "wins"):
                    x, y = x[:k_cut], y[:k_cut]
                assert np.array_equal(x, y), \
                    f"no look-ahead ({schedule}): {col} before the decision changed"
            runs += 1
    # 6. no training rows
    empty = train.slice(0, 0)
    for schedule in schedules:
        out = _replay(rule_cls, params, replay, empty, spec, schedule, "expected")
        last = out.totals["last_charge"]
        assert out.totals["spend"] - last < spec.budget, "no training rows: over budget"
        runs += 1
    summary["replays"] = runs
    return summary


def _poisons(replay: CampaignArrays, row_cut: int) -> list[CampaignArrays]:
    """Copies of ``replay`` with every row from ``row_cut`` on replaced by extreme values."""
    out = []
    n = len(replay)
    for value_x, price_x, cp in ((1e6, 0.0, 1.0), (0.0, 1e12, 0.01), (1e3, 1e-9, 0.5)):
        v = replay.value.copy()
        p = replay.min_win_price.copy()
        c = replay.charge_prob.copy()
        v[row_cut:n] = value_x
        p[row_cut:n] = price_x
        c[row_cut:n] = cp
        out.append(CampaignArrays(replay.campaign_id, replay.ts_us, v, p, c,
                                  replay.placement_code, replay.first_price,
                                  replay.placements))
    return out
