"""Shared pieces of the pacing rules: cold start, target curves, common parameters.

Cold start (``lambda0``, results per currency): the hindsight multiplier of the training
rows for the budget scaled to the training window's share of traffic,
``B_train = B * n_train / expected_auctions`` (``expected_auctions`` = the forecast number
of auctions in the replay window, so ``B_train`` is what the campaign would have spent
over the training traffic at its planned rate). With a cost-per-result cap the solve uses
the cap too and gives ``mu0``. When the training budget does not bind (lambda 0 and mu 0)
``lambda0`` is the smallest positive ratio value/min_win_price of the training rows (the
multiplier that still takes every row); with no training rows, 1.0 (``cold_start_source_``
says which).
"""

from __future__ import annotations

import math

import numpy as np

from replay.kernels.hindsight import solve
from replay.rules.base import NON_NEGATIVE, POSITIVE, Choice, Param, TrainingContext

DEFAULT_LAMBDA0 = 1.0  # results per currency; only used without any training rows


def cold_start(context: TrainingContext) -> tuple[float, float, str]:
    """``(lambda0, mu0, source)`` from the training window (cached on the context)."""
    hit = context.cache.get("cold_start")
    if hit is not None:
        return hit
    train = context.train
    n = len(train)
    if n == 0 or not (context.expected_auctions > 0):
        out = (DEFAULT_LAMBDA0, 0.0, "default")
    else:
        budget_train = context.budget * n / context.expected_auctions
        sol = solve(train.value, train.min_win_price, budget_train, context.cap)
        lam, mu = sol.lambda_, sol.mu
        source = "training"
        if not lam > 0:
            priced = train.min_win_price > 0
            ratios = train.value[priced] / train.min_win_price[priced]
            ratios = ratios[ratios > 0]
            if ratios.size:
                lam = float(ratios.min())
                source = "training (budget not binding: lowest ratio)"
            else:
                lam, source = DEFAULT_LAMBDA0, "default"
        out = (float(lam), float(mu), source)
    context.cache["cold_start"] = out
    return out


def target_curve(context: TrainingContext, kind: str) -> tuple[np.ndarray, np.ndarray]:
    """Cumulative target share over the flight: uniform in time or the traffic forecast."""
    if kind == "traffic" and context.traffic_curve is not None:
        return context.traffic_curve
    return context.uniform_curve()


def expected_or_nan(context: TrainingContext) -> float:
    x = float(context.expected_auctions)
    return x if math.isfinite(x) and x > 0 else math.nan


# Common parameters of the pacing rules (shared Param objects keep the docs uniform).
TARGET = Param("uniform", "-", "target spend curve: uniform in time over the flight, or the "
               "hour-of-week/hour-of-day traffic forecast fit on the training window",
               Choice(("uniform", "traffic")))
FEEDBACK = Param("expected", "-", "spend fed back to the rule: expected (prices of won rows) "
                 "or realized (sampled charges)", Choice(("expected", "realized")))
COLD_START = Param(None, "results per currency", "starting lambda; default: the hindsight "
                   "lambda of the training window (budget scaled to its traffic)", POSITIVE)
NORMALIZE = Param(True, "-", "divide lambda by the per-campaign cold-start lambda0 so one "
                  "step size serves every campaign")
CAP_STEP = Param(None, "unitless", "step of the cap multiplier mu on (spend - C*results)/norm; "
                 "default: step", NON_NEGATIVE)
