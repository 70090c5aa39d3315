"""An invented scenario with a known true effect, for the demo, the examples and the tests.

Scenario (invented; no real people): hospital staff on rotating night shifts ("nights") or on
day shifts only ("days"), and their resting systolic blood pressure (mmHg) at a yearly check.
Older staff, smokers, staff with a higher BMI and porters are more likely to work nights, and the
same traits raise blood pressure: crude comparisons are confounded. Working nights raises systolic
pressure by 4 mmHg at age 42, by 0.15 mmHg more per year of age (a heterogeneous effect), so the
ATE and ATT differ. A negative-control outcome (hearing threshold, dB) shares the confounders but
is not affected by shift work, so its adjusted "effect" should be near zero.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["make_shift_work_data", "true_effects", "DEMO_COVARIATES"]

#: The measured confounders of the scenario, as the demo analyses them.
DEMO_COVARIATES = ("age", "bmi", "smoker", "role")

ROLES = ("nurse", "porter", "admin")


def make_shift_work_data(n: int = 3000, seed: int = 2026, *, missing_share: float = 0.02,
                         null: bool = False) -> pd.DataFrame:
    """Simulate the shift-work scenario.

    Parameters
    ----------
    n : int, default 3000
        Number of staff.
    seed : int, default 2026
        Seed of ``numpy.random.default_rng``.
    missing_share : float, default 0.02
        Share of rows with BMI not recorded (missing completely at random).
    null : bool, default False
        When true, shift work has no effect on anyone (a confounded null).

    Returns
    -------
    pandas.DataFrame
        Columns ``staff_id, shift, age, bmi, smoker, role, systolic_bp, hearing_db`` and the
        individual effect ``_true_effect`` (mmHg), which an analysis must not use: it is there so
        that the truth in the analysed population can be computed (:func:`true_effects`).
    """
    rng = np.random.default_rng(seed)
    age = np.clip(rng.normal(42, 10, n), 20, 66).round()
    bmi = np.clip(rng.normal(27, 4, n) + 0.05 * (age - 42), 16, 50).round(1)
    smoker = rng.binomial(1, 0.25, n)
    role = rng.choice(np.array(ROLES), size=n, p=[0.5, 0.2, 0.3])
    role_exposure = np.select([role == "porter", role == "admin"], [0.6, -0.9], 0.0)
    logit = -0.4 + 0.05 * (age - 42) + 0.12 * (bmi - 27) + 0.7 * smoker + role_exposure
    nights = rng.random(n) < 1 / (1 + np.exp(-logit))
    effect = np.zeros(n) if null else 4.0 + 0.15 * (age - 42)
    role_bp = np.select([role == "porter", role == "admin"], [2.0, -1.0], 0.0)
    base = 118 + 0.5 * (age - 42) + 0.9 * (bmi - 27) + 4.0 * smoker + role_bp
    systolic = (base + effect * nights + rng.normal(0, 10, n)).round(1)
    hearing = (8 + 0.35 * (age - 42) + 2.0 * smoker + 1.5 * (role == "porter")
               + rng.normal(0, 5, n)).round(1)
    bmi_recorded = np.where(rng.random(n) < missing_share, np.nan, bmi)
    return pd.DataFrame({
        "staff_id": np.arange(1, n + 1),
        "shift": np.where(nights, "nights", "days"),
        "age": age.astype(int),
        "bmi": bmi_recorded,
        "smoker": smoker,
        "role": role,
        "systolic_bp": systolic,
        "hearing_db": hearing,
        "_true_effect": effect,
    })


def true_effects(data: pd.DataFrame, analysed_ids) -> dict:
    """The true ATE and ATT (mmHg) among the analysed staff (sample estimands)."""
    rows = data[data["staff_id"].isin(np.asarray(analysed_ids))]
    exposed = rows["shift"] == "nights"
    return {"ate": float(rows["_true_effect"].mean()),
            "att": float(rows.loc[exposed, "_true_effect"].mean()),
            "n": int(len(rows))}
