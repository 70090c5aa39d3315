"""Simulated datasets of the calibration studies; every coefficient is stated here.

Each scenario takes a ``numpy.random.Generator`` and returns a :class:`Dataset`: a table in the
shape a user gives ``stratagap.analyze`` (columns ``t`` exposure 0/1, ``y`` outcome,
covariates) and, for non-null scenarios, the individual effects ``tau`` (``y(1) - y(0)``) in the
table's row order. All are confounded: the confounder raises both the chance of exposure and
the outcome. ``expit(u) = 1 / (1 + exp(-u))``; every ``N(0, 1)`` draw is independent.

================  ===================================================  ==========================================================
scenario          exposure model                                       outcome model
================  ===================================================  ==========================================================
normal_null       x ~ N(0, 1); P(t = 1) = expit(0.8 x)                 y = 1.0 x + N(0, 1); no effect (sharp null)
mixed_binary_null x ~ N(0, 1), g in {0, 1, 2} w.p. 0.40 / 0.35 / 0.25;  P(y = 1) = expit(-0.5 + 0.8 x + 0.6 [g=1] - 0.7 [g=2]);
                  P(t = 1) = expit(-0.3 + 0.8 x + 0.5 [g=1] + 1.0      no effect
                  [g=2])
exp_null          as normal_null                                       y = exp(x) + N(0, 1); no effect (the linear adjustment is
                                                                       misspecified)
heterogeneous     as normal_null                                       y = 1.0 x + t tau + N(0, 1), tau = 1 + 0.5 x (population
                                                                       ATE 1; the ATT is larger, exposed units having larger x)
================  ===================================================  ==========================================================

Dataset ``i`` of a study with root seed ``R`` uses :func:`dataset_rng` ``(R, i)``, child ``i`` of
``numpy.random.SeedSequence(R)``, so any one dataset can be regenerated and rerun on its own.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.special import expit

__all__ = ["Dataset", "dataset_rng", "normal_null", "mixed_binary_null", "exp_null",
           "heterogeneous", "SCENARIOS"]


@dataclass(frozen=True)
class Dataset:
    """One simulated table and (non-null scenarios) the individual effects in its row order."""

    table: pd.DataFrame
    covariates: tuple
    tau: np.ndarray | None = None


def dataset_rng(root: int, index: int) -> np.random.Generator:
    """Generator of dataset ``index`` of a study: child ``index`` of ``SeedSequence(root)``."""
    return np.random.default_rng(np.random.SeedSequence(entropy=root, spawn_key=(index,)))


def _exposure(rng, linear):
    return (rng.random(linear.shape[0]) < expit(linear)).astype(np.int64)


def normal_null(rng, n: int = 2000) -> Dataset:
    """x ~ N(0, 1); P(t = 1) = expit(0.8 x); y = x + N(0, 1); no effect."""
    x = rng.standard_normal(n)
    t = _exposure(rng, 0.8 * x)
    y = 1.0 * x + rng.standard_normal(n)
    return Dataset(pd.DataFrame({"t": t, "y": y, "x": x}), ("x",))


def mixed_binary_null(rng, n: int = 3000) -> Dataset:
    """A normal and a three-level confounder; binary outcome from a logistic model without t.

    P(g = 0, 1, 2) = 0.40, 0.35, 0.25; P(t = 1) = expit(-0.3 + 0.8 x + 0.5 [g=1] + 1.0 [g=2]);
    P(y = 1) = expit(-0.5 + 0.8 x + 0.6 [g=1] - 0.7 [g=2]).
    """
    x = rng.standard_normal(n)
    g = rng.choice(3, size=n, p=[0.40, 0.35, 0.25])
    d1, d2 = (g == 1).astype(float), (g == 2).astype(float)
    t = _exposure(rng, -0.3 + 0.8 * x + 0.5 * d1 + 1.0 * d2)
    y = (rng.random(n) < expit(-0.5 + 0.8 * x + 0.6 * d1 - 0.7 * d2)).astype(np.int64)
    level = np.array(["g0", "g1", "g2"])[g]  # a text column: the data stage codes the dummies
    return Dataset(pd.DataFrame({"t": t, "y": y, "x": x, "g": level}), ("x", "g"))


def exp_null(rng, n: int = 2000) -> Dataset:
    """As :func:`normal_null` but y = exp(x) + N(0, 1): a linear adjustment is misspecified."""
    x = rng.standard_normal(n)
    t = _exposure(rng, 0.8 * x)
    y = np.exp(x) + rng.standard_normal(n)
    return Dataset(pd.DataFrame({"t": t, "y": y, "x": x}), ("x",))


def heterogeneous(rng, n: int = 2000) -> Dataset:
    """Confounded heterogeneous effect: y = x + t (1 + 0.5 x) + N(0, 1)."""
    x = rng.standard_normal(n)
    t = _exposure(rng, 0.8 * x)
    tau = 1.0 + 0.5 * x
    y = 1.0 * x + t * tau + rng.standard_normal(n)
    return Dataset(pd.DataFrame({"t": t, "y": y, "x": x}), ("x",), tau=tau)


SCENARIOS = {"normal_null": normal_null, "mixed_binary_null": mixed_binary_null,
             "exp_null": exp_null, "heterogeneous": heterogeneous}
