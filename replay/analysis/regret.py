"""Regret of a replayed allocation against the hindsight LP, split into three exact parts.

With ``lambda*`` the budget multiplier of the hindsight LP (budget only, results per
currency) and ``surplus = sum_t (v_t - lambda* c_t)^+`` over the same rows (``c_t`` the
minimum winning price):

- unspent budget:  ``lambda* (B - S)``
- overpayment:     ``lambda* (S - C_won)`` (first price: charges above the minimum price)
- misallocation:   ``surplus - (R - lambda* C_won)`` (rows bought below the threshold and
  rows missed above it; always >= 0)

``S`` is the replayed spend, ``R`` its results and ``C_won`` the sum of minimum winning
prices over the won rows. The parts add up to ``lambda* B + surplus - R``, the LP dual
value minus the replayed results, which equals ``upper_bound - R`` by strong duality.
"""

from __future__ import annotations

import math


def decompose_regret(*, budget: float, lambda_star: float, surplus: float,
                     upper_bound: float, results: float, spend: float,
                     min_price_cost: float) -> dict[str, float]:
    """Regret ``upper_bound - results`` (results) and its split; see the module docstring.

    ``relative_regret`` is regret / upper_bound, NaN when upper_bound is 0 (write as null).
    When the budget does not bind (``lambda_star == 0``) unspent and overpayment are 0 and
    the whole regret is misallocation.
    """
    lam = float(lambda_star)
    regret = float(upper_bound) - float(results)
    unspent = lam * (float(budget) - float(spend)) if math.isfinite(budget) else 0.0
    overpayment = lam * (float(spend) - float(min_price_cost))
    misallocation = float(surplus) - (float(results) - lam * float(min_price_cost))
    return {
        "regret": regret,
        "relative_regret": regret / float(upper_bound) if upper_bound > 0 else math.nan,
        "unspent": unspent,
        "overpayment": overpayment,
        "misallocation": misallocation,
    }
