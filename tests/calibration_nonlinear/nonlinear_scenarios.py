"""Null scenarios with nonlinear confounding, and one with a heterogeneous effect (issue 11).

Every scenario draws three confounders, every coefficient stated here:

* ``x ~ N(0, 1)``, ``u ~ Uniform(0, 1)``, ``g`` with levels a, b, c, d of probabilities
  0.4, 0.3, 0.2, 0.1 (``[g=b]`` is its indicator).
* ``G_e = 0.4 [g=b] + 0.7 [g=c] - 0.5 [g=d]`` enters every exposure model and
  ``G_y = 0.5 [g=b] - 0.5 [g=c] + 1.0 [g=d]`` every outcome model.

P(exposed) = expit(lin_e); the outcome never depends on the exposure (a sharp null: no effect
for anyone), except in ``heterogeneous`` where ``y = y(0) + t tau(x)``.

========================  ====================================================  =============================================
scenario                  lin_e (logit of exposure)                             outcome
========================  ====================================================  =============================================
quadratic                 -1.2 + 0.4 x + 0.6 x^2 + 0.8 u + G_e                  x + x^2 + u + G_y + N(0, 1)
exponential_binary        -1.2 + 0.4 x + 0.6 x^2 + 0.8 u + G_e                  P(y=1) = expit(-4.7 + 1.2 exp(0.8 x) + 0.3 G_y)
smooth_threshold          -1.5 + 2.5 s(x) + 0.8 u + G_e, s = expit(4 (x - 0.7)) 2.5 s(x) + u + G_y + N(0, 1)
smooth_threshold_binary   as smooth_threshold                                   P(y=1) = expit(-3.5 + 2.5 s(x) + 0.3 G_y)
product (reported)        -0.5 + 0.6 x + 1.0 u + 1.5 x (u - 0.5) + G_e          x + u + 2 x (u - 0.5) + G_y + N(0, 1)
sharp_step (reported)     -1.0 + 1.5 [x > 0.5] + 0.8 u + G_e                    1.5 [x > 0.5] + u + G_y + N(0, 1)
heterogeneous             as quadratic                                          x + x^2 + u + G_y + t (1 + 0.5 x^2) + N(0, 1)
heterogeneous_overlap     -0.8 + 0.4 x + 0.25 x^2 + 0.8 u + G_e                 as heterogeneous
========================  ====================================================  =============================================

The product and the sharp step are not additive smooth functions of single covariates: additive
splines cannot remove them, so their rejection rates are reported, not required (issue 11).
Dataset ``i`` of a cell uses ``SeedSequence(root, spawn_key=(i,))``, so any dataset can be
regenerated alone: ``make(SCENARIOS["quadratic"], dataset_rng(root, i), n)``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import expit

__all__ = ["SCENARIOS", "ADDITIVE", "REPORTED", "COVARIATES", "dataset_rng", "make"]

COVARIATES = ["x", "u", "g"]
LEVELS = np.array(["a", "b", "c", "d"])
LEVEL_P = (0.4, 0.3, 0.2, 0.1)


def dataset_rng(root: int, index: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(entropy=root, spawn_key=(index,)))


def _confounders(rng, n):
    x = rng.standard_normal(n)
    u = rng.random(n)
    g = rng.choice(4, size=n, p=LEVEL_P)
    ge = np.array([0.0, 0.4, 0.7, -0.5])[g]
    gy = np.array([0.0, 0.5, -0.5, 1.0])[g]
    return x, u, g, ge, gy


def _s(x):
    return expit(4.0 * (x - 0.7))


def _quadratic_e(x, u, ge):
    return -1.2 + 0.4 * x + 0.6 * x ** 2 + 0.8 * u + ge


def _threshold_e(x, u, ge):
    return -1.5 + 2.5 * _s(x) + 0.8 * u + ge


#: name -> (exposure logit, outcome draw(rng, x, u, gy, n) -> (y, tau or None))
SCENARIOS = {
    "quadratic": (_quadratic_e,
                  lambda r, x, u, gy, n: (x + x ** 2 + u + gy + r.standard_normal(n), None)),
    "exponential_binary": (_quadratic_e,
                           lambda r, x, u, gy, n: (
                               (r.random(n) < expit(-4.7 + 1.2 * np.exp(0.8 * x) + 0.3 * gy))
                               .astype(float), None)),
    "smooth_threshold": (_threshold_e,
                         lambda r, x, u, gy, n: (2.5 * _s(x) + u + gy + r.standard_normal(n),
                                                 None)),
    "smooth_threshold_binary": (_threshold_e,
                                lambda r, x, u, gy, n: (
                                    (r.random(n) < expit(-3.5 + 2.5 * _s(x) + 0.3 * gy))
                                    .astype(float), None)),
    "product": (lambda x, u, ge: -0.5 + 0.6 * x + 1.0 * u + 1.5 * x * (u - 0.5) + ge,
                lambda r, x, u, gy, n: (x + u + 2.0 * x * (u - 0.5) + gy
                                        + r.standard_normal(n), None)),
    "sharp_step": (lambda x, u, ge: -1.0 + 1.5 * (x > 0.5) + 0.8 * u + ge,
                   lambda r, x, u, gy, n: (1.5 * (x > 0.5) + u + gy + r.standard_normal(n),
                                           None)),
    "heterogeneous": (_quadratic_e, None),  # outcome drawn in make(): it needs t
    "heterogeneous_overlap": (lambda x, u, ge: -0.8 + 0.4 * x + 0.25 * x ** 2 + 0.8 * u + ge,
                              None),
}
ADDITIVE = ("quadratic", "exponential_binary", "smooth_threshold", "smooth_threshold_binary")
REPORTED = ("product", "sharp_step")


def make(name: str, rng: np.random.Generator, n: int):
    """One dataset of scenario ``name``: ``(DataFrame with t, y, x, u, g; tau or None)``."""
    lin_e, outcome = SCENARIOS[name]
    x, u, g, ge, gy = _confounders(rng, n)
    t = (rng.random(n) < expit(lin_e(x, u, ge))).astype(np.int8)
    if name.startswith("heterogeneous"):
        tau = 1.0 + 0.5 * x ** 2
        y = x + x ** 2 + u + gy + t * tau + rng.standard_normal(n)
    else:
        y, tau = outcome(rng, x, u, gy, n)
    return pd.DataFrame({"t": t, "y": y, "x": x, "u": u, "g": LEVELS[g]}), tau
