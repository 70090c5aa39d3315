"""The negative-control outcome check: an outcome the exposure cannot affect.

The same design (strata, covariance adjustment) is applied to a column that the exposure is
known not to change; a clear "effect" on it is a residual-bias alarm (Lipsitch, Tchetgen
Tchetgen & Cohen 2010). It runs on the analysed rows where the column is recorded.

References
----------
Lipsitch, M., Tchetgen Tchetgen, E. & Cohen, T. (2010). Negative controls: a tool for detecting
confounding and bias in observational studies. Epidemiology 21, 383-388.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .._base.jsonable import fields_dict
from ..errors import InputError
from ..estimation.effects import StratifiedEstimate, stratified_regression
from ..inference.permutation import PermutationResult, residualize, stratified_test

__all__ = ["NegativeControl", "negative_control_check"]


@dataclass(frozen=True)
class NegativeControl:
    """The ``negative_control`` block of ``results.json`` (field names are its keys)."""

    column: str
    n: int  # analysed rows with the column recorded
    estimate: StratifiedEstimate
    test: PermutationResult  # two-sided, covariance-adjusted
    alarm: bool  # test p-value below alpha

    def to_dict(self) -> dict:
        return fields_dict(self)


def negative_control_check(values, t, X, labels, *, column: str, names, estimand: str,
                           alpha: float, engine: str, resamples: int, seed, batch_size,
                           interaction_min_extra, n_linear=None) -> NegativeControl:
    """Test and estimate the exposure's "effect" on a negative-control outcome.

    Parameters
    ----------
    values : array (n,) of float
        The negative-control column on the analysed rows; NaN where it is missing.
    t, X, labels : arrays
        Exposure, design matrix and stratum labels of the analysed rows.
    column : str
        The column's name (for the report and the messages).
    names : list of str
        Design column names.
    estimand, alpha, engine, resamples, seed, batch_size, interaction_min_extra
        As in :class:`stratagap.spec.AnalysisSpec`.
    n_linear : int, optional
        Leading linear columns of ``X`` (the rest are spline columns), as in
        :func:`stratagap.estimation.effects.stratified_regression`.

    Returns
    -------
    NegativeControl
        A covariance-adjusted two-sided permutation test (Rosenbaum 2002, residuals fixed under
        the sharp null) and the within-strata regression estimate.
    """
    ok = np.isfinite(values)
    if ok.sum() < 4:
        raise InputError(f"`negative_control` column {column!r} has fewer than 4 "
                         "non-missing values among analysed rows; choose another column")
    lab = labels[ok]
    residuals = residualize(values[ok], X[ok], lab)
    test = stratified_test(residuals, t[ok], lab, estimand=estimand, alternative="two-sided",
                           engine=engine, resamples=resamples, seed=seed, batch_size=batch_size)
    est = stratified_regression(values[ok], t[ok], X[ok], lab, estimand=estimand,
                                measure="difference", alpha=alpha,
                                interaction_min_extra=interaction_min_extra,
                                population=f"analysed units with {column!r} recorded",
                                names=names, n_linear=n_linear)
    return NegativeControl(column=column, n=int(ok.sum()), estimate=est, test=test,
                           alarm=bool(test.p_value < alpha))
