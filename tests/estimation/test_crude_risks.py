"""The crude comparison of a binary outcome carries each group's risk (issue 10: the report
shows the two risks beside the risk difference or ratio).

Outside values: the NHEFS deaths by quitting status, counted with pandas from the file that
``causaldata`` ships (Hernán & Robins, Causal Inference: What If, the NHEFS data; the counts
are the data's own, not a published table), and statsmodels' ``Table2x2`` risk ratio.
"""

import numpy as np
import pytest
from statsmodels.stats.contingency_tables import Table2x2

from stratagap.estimation.effects import crude


@pytest.fixture(scope="module")
def deaths():
    source = pytest.importorskip("causaldata").nhefs
    frame = source.load_pandas().data[["qsmk", "death"]].dropna()
    return frame["death"].to_numpy(float), frame["qsmk"].to_numpy(int), frame


@pytest.mark.parametrize("measure", ["difference", "rr", "or"])
def test_crude_risks_are_the_group_shares(deaths, measure):
    y, t, frame = deaths
    by_group = frame.groupby("qsmk")["death"].mean()  # pandas, independent of the package
    est = crude(y, t, "binary", measure=measure)
    assert est.risk_exposed == pytest.approx(by_group[1], abs=1e-15)
    assert est.risk_reference == pytest.approx(by_group[0], abs=1e-15)
    assert 0 < est.risk_reference < est.risk_exposed < 1  # 102 of 428 against 216 of 1,201
    if measure == "difference":
        assert est.estimate == pytest.approx(est.risk_exposed - est.risk_reference, abs=1e-15)
    if measure == "rr":
        a = int(((t == 1) & (y == 1)).sum())
        b = int(((t == 1) & (y == 0)).sum())
        c = int(((t == 0) & (y == 1)).sum())
        d = int(((t == 0) & (y == 0)).sum())
        ref = Table2x2(np.array([[a, b], [c, d]]))
        assert est.estimate == pytest.approx(ref.riskratio, rel=1e-12)
        assert est.estimate == pytest.approx(est.risk_exposed / est.risk_reference, rel=1e-12)


def test_continuous_crude_has_no_risks():
    rng = np.random.default_rng(3)
    est = crude(rng.normal(size=40), np.r_[np.ones(20, int), np.zeros(20, int)], "continuous")
    assert not hasattr(est, "risk_exposed") or est.risk_exposed is None
    assert "risk_exposed" not in est.to_dict()
