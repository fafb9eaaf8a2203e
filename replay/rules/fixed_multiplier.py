"""``fixed-multiplier``: bid value x multiplier all flight long (then shaded on first price).

The "what if it had bid this way" baseline. Default multiplier: 1 / lambda0, the cold-start
multiplier of the training window scaled to the replay budget (see ``_pacing``).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from replay.rules._pacing import cold_start
from replay.rules.base import POSITIVE, BidRule, Param, TrainingContext


@njit(cache=True, nogil=True)
def fixed_update(state, params, fb):
    """No update: the multiplier stays where fit put it."""
    return


class FixedMultiplier(BidRule):
    name = "fixed-multiplier"
    summary = "bid = value x multiplier, never updated (baseline)"
    numba_update = fixed_update

    multiplier = Param(None, "currency per result", "bid per unit of value; default: "
                       "1 / cold-start lambda of the training window", POSITIVE)

    def fit(self, context: TrainingContext) -> FixedMultiplier:
        super().fit(context)
        if self.multiplier is None:
            lam0, _, self.cold_start_source_ = cold_start(context)
        else:
            lam0, self.cold_start_source_ = 1.0 / self.multiplier, "param"
        self.lambda0_ = float(lam0)
        self.params_ = np.zeros(1)
        return self

    def start(self) -> np.ndarray:
        self.state_ = np.array([self.lambda0_, 0.0, np.nan])
        return self.state_
