"""An invented scenario with a known true effect, for the demo, the examples and the tests.

Scenario (invented; no real people): hospital staff on rotating night shifts ("nights") or on
day shifts only ("days"), and their resting systolic blood pressure (mmHg) at a yearly check.
Older staff, smokers, staff with a higher BMI and porters are more likely to work nights, and the
same traits raise blood pressure: crude comparisons are confounded. Working nights raises systolic
pressure by 4 mmHg at age 42, by 0.15 mmHg more per year of age (a heterogeneous effect), so the
ATE and ATT differ. A negative-control outcome (hearing threshold, dB) shares the confounders but
is not affected by shift work, so its adjusted "effect" should be near zero.

A time-to-event outcome in the same staff (:func:`make_sick_leave_data`): days from the yearly
check to the start of a first sick-leave spell, followed for up to two years. The same traits
raise the hazard, and nights multiply it by exp(0.4) = 1.49 for everyone (a proportional hazard),
so the risk difference at a horizon varies with each person's baseline hazard; its truth among
the analysed staff is :func:`true_risk_difference`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["make_shift_work_data", "true_effects", "DEMO_COVARIATES", "make_sick_leave_data",
           "true_risk_difference", "SICK_LEAVE_LOG_HR", "FOLLOW_UP_DAYS"]

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


#: Log hazard ratio of nights for a first sick-leave spell (0 under the null).
SICK_LEAVE_LOG_HR = 0.4
#: Administrative end of follow-up (days).
FOLLOW_UP_DAYS = 730


def make_sick_leave_data(n: int = 3000, seed: int = 2026, *, null: bool = False) -> pd.DataFrame:
    """The shift-work staff with a time to a first sick-leave spell.

    The staff, their traits and shifts are those of :func:`make_shift_work_data` (same ``n``,
    ``seed`` and ``null``); the times come from a stream of their own, so the blood-pressure
    columns are unchanged. Hazard per day: exp(log(1/900) + 0.02 (age - 42) + 0.05 (bmi - 27)
    + 0.5 smoker + 0.3 porter - 0.2 admin + 0.4 nights); follow-up ends at 730 days, or earlier
    on leaving the hospital (exponential, mean 2,500 days, independent of everything).

    Returns
    -------
    pandas.DataFrame
        The columns of :func:`make_shift_work_data` plus ``days_followed`` (> 0) and
        ``sick_leave`` (1 = a spell began, 0 = censored), and the hidden per-day hazards
        ``_hazard_days`` and ``_hazard_nights`` of each person under either shift, which an
        analysis must not use (:func:`true_risk_difference` reads them).
    """
    data = make_shift_work_data(n=n, seed=seed, null=null)
    rng = np.random.default_rng([seed, 13])  # a stream of its own: the other columns stay
    bmi = data["bmi"].fillna(27.0).to_numpy()  # rows missing bmi are set aside by the analysis
    role = data["role"].to_numpy()
    log_h = (np.log(1 / 900) + 0.02 * (data["age"].to_numpy() - 42) + 0.05 * (bmi - 27)
             + 0.5 * data["smoker"].to_numpy()
             + np.select([role == "porter", role == "admin"], [0.3, -0.2], 0.0))
    h_days = np.exp(log_h)
    h_nights = h_days * (1.0 if null else np.exp(SICK_LEAVE_LOG_HR))
    nights = data["shift"].to_numpy() == "nights"
    event_time = rng.exponential(1.0 / np.where(nights, h_nights, h_days))
    leaving = rng.exponential(2500.0, n)
    end = np.minimum(leaving, FOLLOW_UP_DAYS)
    observed = np.minimum(event_time, end)
    return data.assign(days_followed=np.maximum(np.ceil(observed), 1.0).astype(int),
                       sick_leave=(event_time <= end).astype(int),
                       _hazard_days=h_days, _hazard_nights=h_nights)


def true_risk_difference(data: pd.DataFrame, analysed_ids, horizon: float) -> dict:
    """True risk differences at ``horizon`` days (nights minus days) among the analysed staff.

    Each person's risk of a spell by ``horizon`` under either shift is 1 - exp(-hazard x
    horizon) (times are rounded up to whole days, a shift of under a day that the truth
    ignores); "ate" averages the difference over the analysed staff, "att" over the analysed
    night workers.
    """
    rows = data[data["staff_id"].isin(np.asarray(analysed_ids))]
    gap = (np.exp(-rows["_hazard_days"] * horizon) - np.exp(-rows["_hazard_nights"] * horizon))
    exposed = rows["shift"] == "nights"
    return {"horizon": float(horizon), "ate": float(gap.mean()),
            "att": float(gap[exposed].mean()), "n": int(len(rows))}
