"""The analysis's sensitivity block: Gamma bounds, the E-value and the tipping grid together.

One call per analysis, on the headline test's values and the headline estimate; the result is
the ``sensitivity`` block of ``results.json``, field for field.
"""

from __future__ import annotations

from dataclasses import dataclass

from .._base.jsonable import jsonable
from ._evalue import EValue, headline_e_value
from ._gamma_bounds import GammaBounds, SensitivityValue, gamma_bounds, sensitivity_value
from ._tipping import TippingGrid, covariate_benchmarks, tipping_grid

__all__ = ["Sensitivity", "sensitivity_analysis"]


@dataclass(frozen=True)
class Sensitivity:
    """The ``sensitivity`` block of ``results.json`` (field names are its keys).

    ``gamma_threshold`` and ``gamma_curve`` are read from ``gamma_threshold_detail`` and
    ``gamma_bounds``; ``results.json`` repeats them at the top of the block for readers.
    """

    e_value: EValue | None
    gamma_threshold_detail: SensitivityValue
    gamma_level: float  # alpha, or alpha / 2 per side for a two-sided test
    gamma_direction: str
    gamma_bounds: GammaBounds
    tipping: TippingGrid

    @property
    def gamma_threshold(self) -> float:
        return self.gamma_threshold_detail.gamma

    @property
    def gamma_curve(self) -> list:
        return self.gamma_bounds.to_dict()["curve"]

    def to_dict(self) -> dict:
        return jsonable({
            "e_value": self.e_value, "gamma_threshold": self.gamma_threshold,
            "gamma_threshold_detail": self.gamma_threshold_detail,
            "gamma_level": self.gamma_level, "gamma_direction": self.gamma_direction,
            "gamma_curve": self.gamma_curve, "gamma_bounds": self.gamma_bounds,
            "tipping": self.tipping})


def sensitivity_analysis(values, t, labels, X, y, terms, *, observed: float, statistic: str,
                         estimand: str, alternative: str, alpha: float, gammas, adjusted,
                         risk_ratio, binary: bool) -> Sensitivity:
    """Every sensitivity view of one analysis.

    Parameters
    ----------
    values : array (n,)
        The values the headline test ran on (residuals for the adjusted statistics).
    t, labels, X, y : arrays
        The analysed rows: exposure, stratum labels, design matrix, outcome.
    terms : list
        The analysed covariate terms (benchmarks for the tipping grid).
    observed : float
        The headline test's statistic; its sign picks the direction of the bounds.
    statistic : {"sum", "mean_difference"}
        The statistic the bounds are computed for.
    estimand, alternative, alpha, gammas
        As in :class:`stratagap.spec.AnalysisSpec`.
    adjusted, risk_ratio
        The headline estimate and (binary outcomes) the standardized risk ratio.
    binary : bool
        Whether the outcome is binary (picks the E-value's scale).

    Returns
    -------
    Sensitivity
    """
    direction = "greater" if observed >= 0 else "less"
    bounds = gamma_bounds(values, t, labels, estimand=estimand, statistic=statistic,
                          direction=direction, gammas=gammas)
    threshold = sensitivity_value(values, t, labels, estimand=estimand, statistic=statistic,
                                  direction=direction, alpha=alpha,
                                  two_sided=alternative == "two-sided")
    e_value = headline_e_value(adjusted, risk_ratio, y, t, binary=binary, alpha=alpha)
    benchmarks = covariate_benchmarks(terms, X, y, t)
    tipping = tipping_grid(adjusted.estimate, adjusted.ci_low, adjusted.ci_high,
                           measure="difference", benchmarks=benchmarks)
    return Sensitivity(e_value=e_value, gamma_threshold_detail=threshold,
                       gamma_level=threshold.alpha, gamma_direction=direction,
                       gamma_bounds=bounds, tipping=tipping)
