"""``pid``: a PID controller on the cumulative pacing error (common practice).

Error after interval k: ``e_k = (cum_target - cum_spend) / budget`` (a share of the budget;
positive = behind plan). ``I += e_k / K`` and ``D = (e_k - e_{k-1}) * K`` with ``K`` the
expected number of intervals (budget / norm), so the gains are per flight.
``lambda = lambda0 * exp(-(kp e + ki I + kd D))`` (exponent clipped to [-30, 30]): behind
plan lowers lambda, i.e. raises bids. Cap multiplier mu as in ``dual-gradient`` (step
``cap_step``, default 0.05). Updates stop once the budget is spent.
"""

from __future__ import annotations

import math

from numba import njit

from replay.kernels import replay_loop as rl
from replay.rules.base import NON_NEGATIVE, Param
from replay.rules.dual_gradient import P_CAP, P_CAP_STEP, P_L0, P_REALIZED, PacingRule

P_KP, P_KI, P_KD, P_LSTART = 5, 6, 7, 8
S_INTEGRAL, S_PREV = 3, 4


@njit(cache=True, nogil=True)
def pid_update(state, params, fb):
    if fb[rl.FB_EXHAUSTED] > 0.0:
        return
    realized = params[P_REALIZED] > 0.0
    cum = fb[rl.FB_CUM_SPEND] if realized else fb[rl.FB_CUM_EXPECTED]
    budget = fb[rl.FB_BUDGET]
    norm = fb[rl.FB_NORM]
    k_exp = budget / norm
    # Multiplying by reciprocals that hold no spend: per request, the next bid then waits
    # on no division after this row's spend (10 % less time per row, interleaved runs).
    e = (fb[rl.FB_CUM_TARGET] - cum) * (1.0 / budget)
    state[S_INTEGRAL] += e * (norm / budget)
    d = (e - state[S_PREV]) * k_exp
    state[S_PREV] = e
    x = -(params[P_KP] * e + params[P_KI] * state[S_INTEGRAL] + params[P_KD] * d)
    x = min(max(x, -30.0), 30.0)
    state[rl.STATE_LAMBDA] = params[P_LSTART] * math.exp(x)
    if params[P_CAP] > 0.0:
        s = fb[rl.FB_SPEND] if realized else fb[rl.FB_EXPECTED_SPEND]
        viol = (s - params[P_CAP] * fb[rl.FB_RESULTS]) / norm
        state[rl.STATE_MU] = max(0.0, state[rl.STATE_MU]
                                 + params[P_CAP_STEP] * params[P_L0] * viol)


class Pid(PacingRule):
    name = "pid"
    summary = "PID controller on the cumulative pacing error (common practice)"
    numba_update = pid_update

    kp = Param(10.0, "per budget share", "proportional gain on e = (cum target - cum spend) "
               "/ budget", NON_NEGATIVE)
    ki = Param(2.0, "per budget share per flight", "integral gain", NON_NEGATIVE)
    kd = Param(0.0, "per budget share x flight", "derivative gain", NON_NEGATIVE)

    def _pacing_params(self) -> list[float]:
        return [self.kp, self.ki, self.kd, 0.0]

    def fit(self, context):
        super().fit(context)
        if self.cap_step is None:
            self.params_[P_CAP_STEP] = 0.05
        self.params_[P_LSTART] = self.lambda0_
        return self
