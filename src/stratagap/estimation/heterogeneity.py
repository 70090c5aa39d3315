"""Do the stratum effects differ? Tests of heterogeneity across strata.

* :func:`cochran_q`: Cochran's Q of stratum estimates on a difference scale (mean or risk
  differences), with I^2 (Higgins & Thompson 2002).
* :func:`breslow_day`: Breslow-Day test of a common odds ratio with Tarone's correction, for
  binary outcomes (statsmodels ``StratifiedTable.test_equal_odds(adjust=True)``).
* :func:`heterogeneity_across_strata`: the analysis's ``heterogeneity`` block (both tests on the
  headline's per-stratum estimates, or a note when they are undefined).

Both have little power with five strata; a large p-value is not evidence of a constant effect.

References
----------
Cochran, W. G. (1954). The combination of estimates from different experiments. Biometrics 10,
101-129.
Higgins, J. P. T. & Thompson, S. G. (2002). Quantifying heterogeneity in a meta-analysis.
Statistics in Medicine 21, 1539-1558.
Breslow, N. E. & Day, N. E. (1980). Statistical Methods in Cancer Research, Vol. I. IARC.
Tarone, R. E. (1985). On heterogeneity tests based on efficient scores. Biometrika 72, 91-95.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import stats

from .._base.jsonable import fields_dict
from ..errors import InputError, ModelWarning

__all__ = ["HeterogeneityTest", "Heterogeneity", "cochran_q", "breslow_day",
           "heterogeneity_across_strata"]


@dataclass(frozen=True)
class HeterogeneityTest:
    """A test that the stratum effects are equal.

    ``statistic`` is chi-square distributed with ``df`` degrees of freedom under equal effects;
    ``i_squared`` (Cochran's Q only) is ``max(0, (Q - df) / Q)``; ``strata_used`` counts the
    strata that entered, ``strata_excluded`` lists the labels left out and why.
    """

    statistic: float
    df: int
    p_value: float
    method: str
    scale: str
    strata_used: int
    i_squared: float | None = None
    pooled_estimate: float | None = None
    strata_excluded: list = field(default_factory=list)

    def to_dict(self) -> dict:
        out = asdict(self)
        for key, value in out.items():
            if isinstance(value, (float, np.floating)):
                value = float(value)
                out[key] = value if math.isfinite(value) else None
            elif isinstance(value, np.integer):
                out[key] = int(value)
        return out


def cochran_q(estimates, ses, *, scale="difference") -> HeterogeneityTest:
    """Cochran's Q test that stratum estimates share one value.

    Parameters
    ----------
    estimates, ses : sequences of float (one per stratum)
        Stratum estimates (mean or risk differences) and their standard errors. Entries whose
        estimate or SE is missing (None/NaN) or whose SE is not positive are left out, with a
        :class:`ModelWarning`.
    scale : str, default "difference"
        Label of the scale, recorded on the result.

    Returns
    -------
    HeterogeneityTest
        ``Q = sum_s (theta_s - theta_bar)^2 / se_s^2`` with the inverse-variance weighted mean
        ``theta_bar`` (Cochran 1954), ``df = S - 1``, p from chi^2(df), and
        ``I^2 = max(0, (Q - df) / Q)`` (Higgins & Thompson 2002).
    """
    est = np.array([math.nan if v is None else float(v) for v in estimates])
    se = np.array([math.nan if v is None else float(v) for v in ses])
    if est.shape != se.shape or est.ndim != 1:
        raise InputError(f"`estimates` and `ses` must be sequences of the same length; got "
                         f"{est.shape} and {se.shape}")
    ok = np.isfinite(est) & np.isfinite(se) & (se > 0)
    excluded = [{"stratum": int(i), "reason": "missing estimate or non-positive SE"}
                for i in np.flatnonzero(~ok)]
    if excluded:
        warnings.warn(f"Cochran's Q: {len(excluded)} strata left out (missing estimate or "
                      "non-positive SE)", ModelWarning, stacklevel=2)
    if ok.sum() < 2:
        raise InputError(f"Cochran's Q needs at least 2 strata with a positive SE; found "
                         f"{int(ok.sum())}")
    e, s = est[ok], se[ok]
    w = 1.0 / s ** 2  # inverse-variance weights
    pooled = float(np.sum(w * e) / np.sum(w))
    q = float(np.sum(w * (e - pooled) ** 2))  # Cochran 1954
    df = int(ok.sum()) - 1
    i2 = max(0.0, (q - df) / q) if q > 0 else 0.0  # Higgins & Thompson 2002
    return HeterogeneityTest(q, df, float(stats.chi2.sf(q, df)),
                             "Cochran's Q (inverse-variance weights), chi-square reference",
                             scale, int(ok.sum()), i2, pooled, excluded)


def breslow_day(y, t, labels) -> HeterogeneityTest:
    """Breslow-Day test of a common odds ratio across strata, with Tarone's correction.

    Parameters
    ----------
    y : array (n,) of 0/1
        Binary outcome.
    t : array (n,) of 0/1
        Exposure.
    labels : int array (n,)
        Stratum labels; ``-1`` rows are ignored.

    Returns
    -------
    HeterogeneityTest
        From ``statsmodels.stats.contingency_tables.StratifiedTable(tables)
        .test_equal_odds(adjust=True)`` (Tarone 1985), ``df = K - 1``. Strata without events
        or without non-events (no information on the odds ratio) are left out and listed.
    """
    from statsmodels.stats.contingency_tables import StratifiedTable

    y = np.asarray(y, dtype=float).ravel()
    t = np.asarray(t).ravel()
    labels = np.asarray(labels).ravel()
    if not (y.shape == t.shape == labels.shape):
        raise InputError(f"y, t and labels must have the same length; got {y.shape}, {t.shape}, "
                         f"{labels.shape}")
    if not np.all(np.isin(y, (0, 1))) or not np.all(np.isin(t, (0, 1))):
        raise InputError("Breslow-Day needs a binary (0/1) outcome and a 0/1 exposure")
    tables, excluded = [], []
    for s in np.unique(labels[labels >= 0]):
        m = labels == s
        a = np.sum((t[m] == 1) & (y[m] == 1))
        b = np.sum((t[m] == 1) & (y[m] == 0))
        c = np.sum((t[m] == 0) & (y[m] == 1))
        d = np.sum((t[m] == 0) & (y[m] == 0))
        if min(a + b, c + d, a + c, b + d) == 0:
            excluded.append({"stratum": int(s), "reason": "a zero margin (no events, no "
                             "non-events or a missing group)"})
            continue
        tables.append([[a, b], [c, d]])
    if len(tables) < 2:
        raise InputError(f"Breslow-Day needs at least 2 strata with events and non-events in "
                         f"both margins; found {len(tables)}")
    if excluded:
        warnings.warn(f"Breslow-Day: {len(excluded)} strata left out (a zero margin)",
                      ModelWarning, stacklevel=2)
    st = StratifiedTable(np.transpose(np.asarray(tables, dtype=float), (1, 2, 0)))
    res = st.test_equal_odds(adjust=True)  # Tarone 1985 correction
    return HeterogeneityTest(float(res.statistic), len(tables) - 1, float(res.pvalue),
                             "Breslow-Day test with Tarone's correction (statsmodels)",
                             "odds ratio", len(tables), None, float(st.oddsratio_pooled),
                             excluded)


@dataclass(frozen=True)
class Heterogeneity:
    """The ``heterogeneity`` block of ``results.json`` (field names are its keys).

    ``cochran_q`` is None, with a ``note`` saying why, when fewer than 2 strata have a standard
    error; ``breslow_day`` is set for binary outcomes only.
    """

    cochran_q: HeterogeneityTest | None
    breslow_day: HeterogeneityTest | None = None
    note: str | None = None

    def to_dict(self) -> dict:
        return fields_dict(self, optional=("breslow_day", "note"))


def heterogeneity_across_strata(per_stratum, y, t, labels, *, binary: bool) -> Heterogeneity:
    """Cochran's Q of the per-stratum estimates (and Breslow-Day for binary outcomes).

    Parameters
    ----------
    per_stratum : list of dict
        The headline's per-stratum rows (``estimate``, ``se``); rows without a positive finite
        standard error are left out.
    y, t, labels : arrays (n,)
        The analysed rows, for Breslow-Day.
    binary : bool
        Whether the outcome is binary (adds Breslow-Day).

    Returns
    -------
    Heterogeneity
        Undefined (``cochran_q`` None and a note) with fewer than 2 usable strata.
    """
    usable = [s for s in per_stratum if s["se"] is not None and np.isfinite(s["se"]) and s["se"] > 0]
    if len(usable) < 2:
        return Heterogeneity(cochran_q=None, note="fewer than 2 strata with a standard error: "
                                                  "heterogeneity across strata is not defined")
    return Heterogeneity(
        cochran_q=cochran_q([s["estimate"] for s in usable], [s["se"] for s in usable]),
        breslow_day=breslow_day(y, t, labels) if binary else None)
