"""``ftl``: follow the leader on all rows seen so far (training window included).

At each update: the multiplier that, replayed over every row seen so far (training rows
plus the replay rows before the decision), makes the average cost per auction equal the
target ``a``: ``lambda = ftl_lambda_for_spend(index, a * rows_seen)`` (the exact hindsight
multiplier of those rows for that spend; H3's incremental index, O(log^2 n) per update).

``a = budget / expected auctions in the flight`` (forecast from the training traffic), or
with ``retarget=true``: ``remaining budget / remaining forecast auctions`` (forecast
auctions x remaining share of the traffic curve). Without training rows the flight's
auction count is estimated online as ``rows_seen / elapsed share``, and the rule bids
nothing before its first update. Budget only: a cost-per-result cap is not used (mu = 0).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from replay.kernels import replay_loop as rl
from replay.kernels.ftl_index import (
    ftl_capacity,
    ftl_count,
    ftl_index_new,
    ftl_index_reset,
    ftl_insert,
    ftl_lambda_for_spend,
)
from replay.rules import _pacing
from replay.rules.base import BidRule, IntervalFeedback, Param, TrainingContext

P_BUDGET, P_EXPECTED, P_RETARGET, P_NTRAIN = range(4)


@njit(cache=True, nogil=True)
def _target_per_auction(params, remaining, remaining_share, rows_seen):
    expected = params[P_EXPECTED]
    if math.isnan(expected):
        elapsed = 1.0 - remaining_share
        expected = rows_seen / elapsed if elapsed > 0.0 else math.nan
    if params[P_RETARGET] > 0.0:
        left = expected * remaining_share
        return remaining / left if left > 0.0 else math.nan
    return params[P_BUDGET] / expected


@njit(cache=True, nogil=True)
def ftl_update(state, params, fb):
    """Ask the loop for the FTL multiplier at spend a * (training rows + rows seen)."""
    a = _target_per_auction(params, fb[rl.FB_REMAINING], fb[rl.FB_REMAINING_SHARE],
                            fb[rl.FB_ROWS_SEEN])
    if math.isnan(a):
        state[rl.STATE_QUERY] = math.nan
        return
    state[rl.STATE_QUERY] = max(a, 0.0) * (params[P_NTRAIN] + fb[rl.FB_ROWS_SEEN])


class FollowTheLeader(BidRule):
    name = "ftl"
    summary = "follow the leader: hindsight lambda over all rows seen so far"
    uses_index = True
    fused_equivalent = True  # update() below mirrors the fused loop exactly
    numba_update = ftl_update

    retarget = Param(False, "-", "target cost per auction = remaining budget / remaining "
                     "forecast auctions (default: budget / forecast auctions)")

    def fit(self, context: TrainingContext) -> FollowTheLeader:
        super().fit(context)
        self.train_value_ = np.ascontiguousarray(context.train.value, np.float64)
        self.train_price_ = np.ascontiguousarray(context.train.min_win_price, np.float64)
        self.params_ = np.array([context.budget, _pacing.expected_or_nan(context),
                                 1.0 if self.retarget else 0.0, float(len(context.train))])
        return self

    def make_index(self, capacity: int):
        """A fresh index holding the training rows, room for ``capacity`` more."""
        need = len(self.train_value_) + capacity
        index = getattr(self, "_spare_index", None)
        if index is not None and ftl_capacity(index) >= need:
            ftl_index_reset(index)  # same memory as the last run: no fresh pages to zero
        else:
            index = ftl_index_new(need)
            self._spare_index = index
        ftl_insert(index, self.train_value_, self.train_price_)
        return index

    def start(self, capacity: int = 0) -> np.ndarray:
        self.index_ = self.make_index(capacity)
        self.state_ = np.array([rl.NO_BID_LAMBDA, 0.0, np.nan])
        n = self.params_[P_NTRAIN]
        if n > 0 and not math.isnan(self.params_[P_EXPECTED]):
            a = self.params_[P_BUDGET] / self.params_[P_EXPECTED]
            self.state_[0] = ftl_lambda_for_spend(self.index_, a * n)
        return self.state_

    def update(self, feedback: IntervalFeedback) -> None:
        # Generic path: same arithmetic as the fused loop (insert, update, query).
        if ftl_count(self.index_) + len(feedback.value) > ftl_capacity(self.index_):
            raise RuntimeError("ftl: index too small; call start(capacity=replay rows)")
        ftl_insert(self.index_, np.ascontiguousarray(feedback.value, np.float64),
                   np.ascontiguousarray(feedback.min_win_price, np.float64))
        ftl_update(self.state_, self.params_, feedback.fb)
        q = self.state_[rl.STATE_QUERY]
        if not math.isnan(q):
            self.state_[rl.STATE_LAMBDA] = ftl_lambda_for_spend(self.index_, q)
