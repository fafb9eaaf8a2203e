"""Benchmarks of the replay loop per bid rule (never timed tests).

Schedules: ``batch`` = every 15 min of log time, ``every_1000`` = every 1,000 requests,
``per_request`` = after every request, ``1000_updates`` = n/1000 requests per update
(1,000 updates in all; the FTL target). The timed part is the replay itself
(``PreparedReplay.run``: rule start, the compiled loop, the result tables); windowing,
shading and cold-start fits on the training window happen once before, as in a sweep.
Data: ``replay.scenario.synthetic_campaign`` (7 days, 3 placements, half first price);
the first 10 % of the span is the training window, the replay has ``n_rows`` rows.
"""

from __future__ import annotations

import time
from collections.abc import Callable

import numpy as np

from replay.engines.campaign import Schedule, prepare_replay
from replay.rules.registry import make_rule
from replay.schema import CampaignSpec

SCHEDULES = ("batch", "every_1000", "per_request", "1000_updates")
#: Per-request dual updates need a small step (one request's gap is large).
PER_REQUEST_PARAMS = {"dual-gradient": {"step": 1e-4}, "dual-mirror": {"step": 1e-4},
                      "pid": {}}


def _schedule(name: str, n_rows: int) -> Schedule:
    if name == "batch":
        return Schedule(every_us=15 * 60 * 1_000_000)
    if name == "every_1000":
        return Schedule(every_n=1000)
    if name == "per_request":
        return Schedule(every_n=1)
    if name == "1000_updates":
        return Schedule(every_n=max(1, n_rows // 1000))
    raise ValueError(f"schedule {name!r}: allowed: {', '.join(SCHEDULES)}")


def prepare_rule_case(rule_name: str, n_rows: int, schedule: str, seed: int = 0,
                      series_max: int | None = None) -> tuple[Callable[[], object], int, float]:
    """``(run, rows, prepare_seconds)``: a callable replaying ``n_rows`` rows once, the row
    count, and the seconds the once-per-campaign preparation took (training-window fits,
    win thresholds). ``series_max``: see ``prepare_replay`` (None: its default)."""
    from replay.scenario import synthetic_campaign

    total = int(n_rows / 0.9)
    data = synthetic_campaign(total, seed=seed, days=7.0)
    cut = int(data.ts_us[0] + 0.1 * (data.ts_us[-1] - data.ts_us[0]))
    train, replay = data.window(None, cut), data.window(cut, None)
    # A budget that binds: 30 % of what winning every row at its price would cost.
    spec = CampaignSpec(data.campaign_id, budget=0.3 * float(replay.min_win_price.sum()))
    params = PER_REQUEST_PARAMS.get(rule_name, {}) if schedule == "per_request" else {}
    t0 = time.perf_counter()
    options = {} if series_max is None else {"series_max": series_max}
    prepared = prepare_replay(replay, train, spec, make_rule(rule_name, params),
                              _schedule(schedule, len(replay)), "expected", seed, **options)
    return prepared.run, len(replay), time.perf_counter() - t0


def bench_rule(rule_name: str, n_rows: int = 10_000_000, schedule: str = "batch",
               seed: int = 0, repeats: int = 3) -> dict[str, float]:
    """Median seconds of one replay (after a warm-up run that compiles) and rows per second."""
    run, rows, _ = prepare_rule_case(rule_name, n_rows, schedule, seed)
    run()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        run()
        times.append(time.perf_counter() - t0)
    seconds = float(np.median(times))
    return {"rule": rule_name, "schedule": schedule, "rows": rows, "seconds": seconds,
            "rows_per_s": rows / seconds if seconds > 0 else float("nan")}


def bench_hindsight(n_rows: int = 10_000_000, seed: int = 0, repeats: int = 3) -> float:
    """Median seconds of one hindsight solve over the same replay rows (for the FTL ratio)."""
    from replay.kernels.hindsight import solve
    from replay.scenario import synthetic_campaign

    data = synthetic_campaign(int(n_rows / 0.9), seed=seed, days=7.0)
    cut = int(data.ts_us[0] + 0.1 * (data.ts_us[-1] - data.ts_us[0]))
    replay = data.window(cut, None)
    budget = 0.3 * float(replay.min_win_price.sum())
    solve(replay.value, replay.min_win_price, budget)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        solve(replay.value, replay.min_win_price, budget)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


if __name__ == "__main__":  # python -m replay.bench_rules [n_rows]
    import json
    import sys

    n = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000_000
    out = [bench_rule(r, n, s) for r in ("fixed-multiplier", "dual-mirror")
           for s in ("batch", "every_1000", "per_request")]
    out.append(bench_rule("ftl", n, "1000_updates"))
    out.append({"hindsight_seconds": bench_hindsight(n)})
    print(json.dumps(out, indent=2))
