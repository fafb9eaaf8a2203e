"""``fixed-bid``: a manual bid per impression, optionally per placement (baseline).

The bid is submitted as is (no value scaling, no shading). Default bid: the cold-start
budget-adjusted value of an average training row, ``mean(value) / lambda0``. ``lambda_``
is reported as 0 (this rule has no multiplier).
"""

from __future__ import annotations

import numpy as np

from replay.errors import UsageError
from replay.rules._pacing import cold_start
from replay.rules.base import NON_NEGATIVE, BidRule, Param, TrainingContext
from replay.rules.fixed_multiplier import fixed_update


class FixedBid(BidRule):
    name = "fixed-bid"
    summary = "a fixed bid per impression, optionally per placement (baseline)"
    fixed_bid = True
    numba_update = fixed_update

    bid = Param(None, "currency per impression", "bid on every placement not in bids; "
                "default: mean training value / cold-start lambda", NON_NEGATIVE)
    bids = Param(None, "currency per impression", "per-placement bids, placement:bid,...",
                 kind="dict")

    def fit(self, context: TrainingContext) -> FixedBid:
        super().fit(context)
        names = [p for p, _ in context.placements]
        if self.bids:
            unknown = sorted(set(self.bids) - set(names))
            if unknown:
                raise UsageError(f"rule 'fixed-bid': bids names unknown placement "
                                 f"{unknown[0]!r}; known: {', '.join(names) or 'none'}")
        default = self.bid
        if default is None:
            lam0, _, _ = cold_start(context)
            mean_v = float(np.mean(context.train.value)) if len(context.train) else 0.0
            default = mean_v / lam0
        per = np.full(max(len(names), 1), float(default))
        for i, p in enumerate(names):
            if self.bids and p in self.bids:
                per[i] = self.bids[p]
        self.bid_per_placement_ = per
        self.params_ = np.zeros(1)
        return self

    def start(self) -> np.ndarray:
        self.state_ = np.array([0.0, 0.0, np.nan])
        return self.state_
