"""Invented rate scenario with a known truth: night shifts and sick-leave spells.

Each employee has years of follow-up (``years``, uniform 0.5 to 4, independent of everything
else) and a count of sick-leave spells (``spells``, Poisson with mean ``years x rate``). The
rate depends on standardized age and smoking, which also drive the chance of working nights,
so the crude rate difference is confounded. Nights multiply the rate by ``rate_ratio``.

Truth (ATE, person-time weighted, every unit analysed): follow-up is independent of the
covariates, so the standardized rate difference is ``(rate_ratio - 1) E[r0(X)]`` with
``E[r0(X)] = BASE exp(B_AGE^2 / 2) (1 - P_SMOKE + P_SMOKE exp(B_SMOKE))`` (age ~ N(0, 1),
smoking ~ Bernoulli(P_SMOKE), independent): a closed form.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

BASE, B_AGE, B_SMOKE, P_SMOKE = 0.25, 0.45, 0.6, 0.3


def true_rate_difference(rate_ratio: float) -> float:
    """Closed-form ATE rate difference (events per year) of :func:`make_rate_data`."""
    mean_r0 = BASE * math.exp(B_AGE ** 2 / 2) * (1 - P_SMOKE + P_SMOKE * math.exp(B_SMOKE))
    return (rate_ratio - 1.0) * mean_r0


def make_rate_data(n: int = 1500, rate_ratio: float = 1.4, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    age = rng.normal(size=n)
    smoker = rng.binomial(1, P_SMOKE, n)
    score = 1 / (1 + np.exp(-(-0.4 + 0.7 * age + 0.9 * smoker)))
    nights = rng.binomial(1, score)
    years = rng.uniform(0.5, 4.0, n)
    rate = BASE * np.exp(B_AGE * age + B_SMOKE * smoker) * np.where(nights == 1, rate_ratio, 1.0)
    spells = rng.poisson(years * rate)
    return pd.DataFrame({"shift": np.where(nights == 1, "nights", "days"),
                         "age_z": age, "smoker": smoker, "years": years, "spells": spells})
