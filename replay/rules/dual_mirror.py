"""``dual-mirror``: dual mirror descent with the entropy map (multiplicative update).

``lambda <- lambda * exp(-step * (rho_k - s_k) / norm)`` (the exponent is clipped to
[-30, 30]); ``norm`` and the cap multiplier ``mu`` (additive, as in ``dual-gradient``) as in
``dual_gradient.py``. The cold start ``lambda0`` only sets the starting point (the update
is scale free). Balseiro, Lu, Mirrokni (Operations Research 2023).
"""

from __future__ import annotations

import math

from numba import njit

from replay.kernels import replay_loop as rl
from replay.rules.base import POSITIVE, Param
from replay.rules.dual_gradient import P_REALIZED, P_STEP, PacingRule, cap_multiplier_step


@njit(cache=True, nogil=True)
def dual_mirror_update(state, params, fb):
    if fb[rl.FB_EXHAUSTED] > 0.0:
        return
    s = fb[rl.FB_SPEND] if params[P_REALIZED] > 0.0 else fb[rl.FB_EXPECTED_SPEND]
    norm = fb[rl.FB_NORM]
    x = -params[P_STEP] * (fb[rl.FB_TARGET] - s) / norm
    x = min(max(x, -30.0), 30.0)
    state[rl.STATE_LAMBDA] = state[rl.STATE_LAMBDA] * math.exp(x)
    cap_multiplier_step(state, params, s, fb[rl.FB_RESULTS], norm)


class DualMirror(PacingRule):
    name = "dual-mirror"
    summary = "multiplicative dual update of lambda (mirror descent, entropy map)"
    numba_update = dual_mirror_update

    step = Param(0.05, "unitless", "log(lambda) moves by step x (spend - target)/norm per "
                 "update", POSITIVE)
