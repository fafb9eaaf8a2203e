"""The reference pass: the fastest any threshold rule could go on this machine.

One sequential pass over value and min_win_price: bid value * multiplier, compare, and
accumulate spend and results of the wins. ``replay bench`` reports every kernel as a
fraction of this pass so numbers compare across machines.

Branch-free on purpose: whether a row is won is a coin flip to the CPU, and LLVM lowers
``x if won else 0.0`` on float64 to a conditional jump on x86, so a plainly written pass
measures mispredicted jumps (about 6 ns per row on an AMD EPYC VM against 1.6 ns here)
rather than the machine's memory and arithmetic.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from replay.kernels.bits import UNIT


@njit(cache=True, nogil=True)
def _reference_pass(value, min_win_price, multiplier, unit):
    spend = 0.0
    results = 0.0
    wins = 0
    for i in range(value.shape[0]):
        price = min_win_price[i]
        won = value[i] * multiplier >= price
        f = unit[np.int64(won)]  # 1.0 or 0.0: exact products, no jump
        spend += price * f
        results += value[i] * f
        wins += won
    return spend, results, wins


def reference_pass(value: np.ndarray, min_win_price: np.ndarray,
                   multiplier: float) -> tuple[float, float, int]:
    """Spend (currency), results and wins of bidding ``value * multiplier`` (second price);
    finite inputs (as the log schema guarantees)."""
    return _reference_pass(value, min_win_price, float(multiplier), UNIT)
