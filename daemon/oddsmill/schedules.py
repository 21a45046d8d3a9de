"""Learning-rate schedules (PROTOCOL 5): `rate(settings, t) -> eta_t`, stateless.

The compiled kernel carries its own copy of these formulas (numba cannot call this module); the
tests hold the two to the same table of values.

>>> from oddsmill.settings import LearnerSettings
>>> rate(LearnerSettings(schedule="constant", eta0=0.2), 10_000)
0.2
>>> rate(LearnerSettings(schedule="inverse-time", eta0=0.5, l2=0.01), 200)
0.25
"""

from __future__ import annotations

from .settings import LearnerSettings

# Codes the kernel sees in its settings record.
CODES = {"constant": 0, "inverse-time": 1, "power": 2, "adagrad": 3}


def rate(settings: LearnerSettings, t: int, grad_sq_sum: float = 0.0) -> float:
    """eta_t for learned step t (counting from 0).

    For AdaGrad the rate is per feature; `grad_sq_sum` is that feature's sum of squared gradients.
    """
    s = settings
    if s.schedule == "constant":
        return s.eta0
    if s.schedule == "inverse-time":
        # Bottou, "Stochastic Gradient Descent Tricks", 2012
        return s.eta0 / (1.0 + s.l2 * s.eta0 * t)
    if s.schedule == "power":
        # Xu, "Towards optimal one pass large scale learning with averaged SGD", arXiv:1107.2490
        return float(s.eta0 * (1.0 + s.decay_a * s.eta0 * t) ** (-s.power))
    # Duchi, Hazan and Singer, JMLR 2011
    return float(s.eta0 / (s.adagrad_delta + grad_sq_sum**0.5))
