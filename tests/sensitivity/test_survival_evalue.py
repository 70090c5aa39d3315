"""E-values of the risk ratio at the horizon and of the hazard ratio.

Sources: VanderWeele & Ding 2017 (Ann Intern Med 167:268-274), worked example RR 3.9 ->
E-value 7.26 (from memory; also the module's doctest); the HR conversion of VanderWeele 2020
(Biometrics 76:746-752) hand-worked from its formula for HR = 2.
"""

import math

import pytest

from stratagap.sensitivity import (hazard_ratio_e_value, hazard_ratio_to_risk_ratio,
                                   risk_ratio_e_value)


def test_risk_ratio_at_horizon():
    ev = risk_ratio_e_value(3.9, 1.8, 8.7, horizon=5)
    assert ev.point == pytest.approx(7.26, abs=0.005)  # VanderWeele & Ding 2017, from memory
    assert ev.ci_limit == pytest.approx(1.8 + math.sqrt(1.8 * 0.8), abs=1e-12)
    assert "horizon 5" in ev.computed_from


def test_hazard_ratio_rare_and_common():
    rare = hazard_ratio_e_value(2.0, 1.5, 2.7, incidence=0.10)
    assert rare.rr_used == pytest.approx(2.0) and "read as a risk ratio" in rare.computed_from
    rr = (1 - 0.5 ** math.sqrt(2)) / (1 - 0.5 ** math.sqrt(0.5))  # hand-worked: 0.62479 / 0.38746 = 1.6125
    assert hazard_ratio_to_risk_ratio(2.0) == pytest.approx(1.6125, abs=1e-4)
    common = hazard_ratio_e_value(2.0, 1.5, 2.7, incidence=0.15)
    assert common.rr_used == pytest.approx(rr, abs=1e-12)
    assert common.point == pytest.approx(rr + math.sqrt(rr * (rr - 1)), abs=1e-12)
    lo = hazard_ratio_to_risk_ratio(1.5)
    assert common.ci_limit == pytest.approx(lo + math.sqrt(lo * (lo - 1)), abs=1e-12)
    protective = hazard_ratio_e_value(0.5, 0.37, 0.67, incidence=0.3)
    assert protective.rr_used == pytest.approx(1 / hazard_ratio_to_risk_ratio(0.5), abs=1e-12)
    assert hazard_ratio_to_risk_ratio(1.0) == pytest.approx(1.0)
