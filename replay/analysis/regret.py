"""Regret of a replayed allocation against the hindsight LP, split into four exact parts.

The LP: max sum_t v_t x_t  s.t.  sum_t c_t x_t <= B (multiplier ``lambda*``), with a
cost-per-result cap C also sum_t (c_t - C v_t) x_t <= 0 (multiplier ``mu*``), 0 <= x <= 1.
Its dual value is ``lambda* B + sum_t g_t^+`` with ``g_t = v_t (1 + mu* C) - c_t
(lambda* + mu*)`` (``c_t`` the minimum winning price), equal to the optimum by strong
duality. For a replay with spend ``S``, results ``R`` and ``C_won`` the sum of minimum
winning prices over its won rows W:

- unspent budget:  ``lambda* (B - S)``
- overpayment:     ``(lambda* + mu*) (S - C_won)`` (first price: charges above the minimum
  price)
- cap slack:       ``mu* (C R - S)`` (room left under the cap; negative when the replay
  broke it)
- misallocation:   ``sum_t g_t^+ - sum_{t in W} g_t`` (rows bought below the optimum's
  threshold and rows missed above it; always >= 0)

They add up to ``lambda* B + sum_t g_t^+ - R``, the dual value minus the replayed results,
which is ``upper_bound - R``. Without a binding cap (``mu* = 0``) the cap slack is 0 and
``sum_t g_t^+`` is the surplus ``sum_t (v_t - lambda* c_t)^+``. (Derivation: expand
``sum_{t in W} g_t = R (1 + mu* C) - (lambda* + mu*) C_won``.)
"""

from __future__ import annotations

import math


def decompose_regret(*, budget: float, lambda_star: float, surplus: float,
                     upper_bound: float, results: float, spend: float,
                     min_price_cost: float, mu_star: float = 0.0, cap: float | None = None,
                     dual_value: float | None = None) -> dict[str, float]:
    """Regret ``upper_bound - results`` (results) and its split; see the module docstring.

    ``surplus`` = sum_t (v_t - lambda* c_t)^+; with a binding cap (``mu_star > 0``, cap
    ``C`` in currency per result) the positive part is taken from the LP's ``dual_value``
    instead. ``relative_regret`` is regret / upper_bound, NaN when upper_bound is 0 (write
    as null). When neither constraint binds every multiplier is 0 and the whole regret is
    misallocation.
    """
    lam, mu = float(lambda_star), float(mu_star)
    if mu > 0.0 and (cap is None or dual_value is None):
        raise ValueError("a binding cap (mu_star > 0) needs cap and dual_value")
    capf = float(cap) if mu > 0.0 else 0.0
    b, r, s, c_won = float(budget), float(results), float(spend), float(min_price_cost)
    positive = (float(dual_value) - (lam * b if lam > 0.0 else 0.0)) if mu > 0.0 \
        else float(surplus)
    regret = float(upper_bound) - r
    return {
        "regret": regret,
        "relative_regret": regret / float(upper_bound) if upper_bound > 0 else math.nan,
        "unspent": lam * (b - s) if math.isfinite(b) else 0.0,
        "overpayment": (lam + mu) * (s - c_won),
        "cap_slack": mu * (capf * r - s),
        "misallocation": positive - (r * (1.0 + mu * capf) - (lam + mu) * c_won),
    }
