"""The reference pass: the fastest any threshold rule could go on this machine.

One sequential pass over value and min_win_price: bid value * multiplier, compare, and
accumulate spend and results of the wins. ``replay bench`` reports every kernel as a
fraction of this pass so numbers compare across machines.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def reference_pass(value: np.ndarray, min_win_price: np.ndarray,
                   multiplier: float) -> tuple[float, float, int]:
    """Spend (currency), results and wins of bidding ``value * multiplier`` (second price)."""
    spend = 0.0
    results = 0.0
    wins = 0
    for i in range(value.shape[0]):
        price = min_win_price[i]
        if value[i] * multiplier >= price:
            spend += price
            results += value[i]
            wins += 1
    return spend, results, wins
