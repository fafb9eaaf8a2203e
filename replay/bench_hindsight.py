"""Benchmarks of the hindsight kernel (called by ``replay bench``; never timed in tests).

Both functions build a seeded synthetic campaign in memory, warm the numba code up, and
report the median of ``repeats`` timed runs on one core. The budget is 30 % of the cost of
every row, so it binds.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable

import numpy as np


def _median(fn: Callable[[], object], repeats: int) -> float:
    fn()  # warm-up: compilation and page faults are not part of the number
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def _campaign(n_rows: int, seed: int) -> tuple[np.ndarray, np.ndarray, float]:
    from replay.scenario import synthetic_campaign

    a = synthetic_campaign(n_rows, seed=seed)
    return a.value, a.min_win_price, 0.3 * float(a.min_win_price.sum())


def bench_solve(n_rows: int = 10_000_000, seed: int = 11, repeats: int = 5) -> dict[str, float]:
    """Seconds (median) of one ``solve`` (weighted selection, no curve) on ``n_rows`` rows."""
    from replay.kernels.hindsight import solve

    value, price, budget = _campaign(n_rows, seed)
    seconds = _median(lambda: solve(value, price, budget), repeats)
    return {"rows": n_rows, "seconds": seconds,
            "rows_per_s": n_rows / seconds if seconds > 0 else float("inf")}


def bench_curve(n_rows: int = 10_000_000, points: int = 16, seed: int = 11,
                repeats: int = 3) -> dict[str, float]:
    """Seconds (median) of a ``points``-budget curve (0.25x to 4x) from one sort."""
    from replay.kernels.hindsight import budget_curve

    value, price, budget = _campaign(n_rows, seed)
    budgets = budget * np.geomspace(0.25, 4.0, points)
    seconds = _median(lambda: budget_curve(value, price, budgets), repeats)
    return {"rows": n_rows, "points": points, "seconds": seconds,
            "rows_per_s": n_rows / seconds if seconds > 0 else float("inf")}


if __name__ == "__main__":  # python -m replay.bench_hindsight
    import json
    import sys

    n = int(sys.argv[1]) if len(sys.argv) > 1 else 10_000_000
    print(json.dumps({"solve": bench_solve(n), "curve": bench_curve(n)}, indent=2))
