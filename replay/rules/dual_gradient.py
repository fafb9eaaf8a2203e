"""``dual-gradient``: online (sub)gradient descent on the budget multiplier.

After interval k with target spend rho_k and spend s_k (expected or realized):
``lambda <- max(0, lambda - step * lambda0 * (rho_k - s_k) / norm)``, with ``norm`` the
average per-interval target (budget / expected number of intervals, ``fb[FB_NORM]``) and
``lambda0`` the cold start (1 with ``normalize=false``). With a cost-per-result cap C:
``mu <- max(0, mu + cap_step * lambda0 * (s_k - C r_k) / norm)``. Updates stop once the
budget is spent. Balseiro, Lu, Mirrokni (Operations Research 2023) analyse this update.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from replay.kernels import replay_loop as rl
from replay.rules import _pacing
from replay.rules.base import POSITIVE, BidRule, Param, TrainingContext

P_STEP, P_L0, P_REALIZED, P_CAP, P_CAP_STEP = range(5)


@njit(cache=True, nogil=True)
def dual_gradient_update(state, params, fb):
    if fb[rl.FB_EXHAUSTED] > 0.0:
        return
    s = fb[rl.FB_SPEND] if params[P_REALIZED] > 0.0 else fb[rl.FB_EXPECTED_SPEND]
    norm = fb[rl.FB_NORM]
    gap = (fb[rl.FB_TARGET] - s) / norm
    state[rl.STATE_LAMBDA] = max(0.0, state[rl.STATE_LAMBDA] - params[P_STEP] * params[P_L0] * gap)
    if params[P_CAP] > 0.0:
        viol = (s - params[P_CAP] * fb[rl.FB_RESULTS]) / norm
        state[rl.STATE_MU] = max(0.0, state[rl.STATE_MU]
                                 + params[P_CAP_STEP] * params[P_L0] * viol)


class PacingRule(BidRule):
    """Shared fit/start of the dual rules: cold start, normalization, target, cap."""

    cold_start = _pacing.COLD_START
    normalize = _pacing.NORMALIZE
    target = _pacing.TARGET
    feedback = _pacing.FEEDBACK
    cap_step = _pacing.CAP_STEP

    def _pacing_params(self) -> list[float]:
        return []

    def fit(self, context: TrainingContext) -> PacingRule:
        super().fit(context)
        lam0, mu0, self.cold_start_source_ = _pacing.cold_start(context)
        if self.cold_start is not None:
            lam0, self.cold_start_source_ = float(self.cold_start), "param"
        self.lambda0_ = float(lam0)
        self.mu0_ = float(mu0) if context.cap else 0.0
        self.curve_ = _pacing.target_curve(context, self.target)
        cap = float(context.cap) if context.cap else 0.0
        norm_l0 = self.lambda0_ if self.normalize else 1.0
        step = getattr(self, "step", 0.0)
        cap_step = step if self.cap_step is None else self.cap_step
        self.params_ = np.array([step, norm_l0, 1.0 if self.feedback == "realized" else 0.0,
                                 cap, cap_step, *self._pacing_params()], np.float64)
        return self

    def start(self) -> np.ndarray:
        self.state_ = np.array([self.lambda0_, self.mu0_, np.nan, 0.0, 0.0])
        return self.state_


class DualGradient(PacingRule):
    name = "dual-gradient"
    summary = "additive dual update of lambda (online gradient descent)"
    numba_update = dual_gradient_update

    step = Param(0.05, "unitless", "lambda/lambda0 moves by step x (target - spend)/norm "
                 "per update", POSITIVE)
