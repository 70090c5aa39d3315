"""The analysis's sensitivity block: Gamma bounds, the E-value and the tipping grid together.

One call per analysis, on the headline test's values and the headline estimate; the result is
the ``sensitivity`` block of ``results.json``, field for field.
"""

from __future__ import annotations

from dataclasses import dataclass

from .._base.jsonable import jsonable
from ._evalue import EValue, headline_e_value
from ._gamma_bounds import (GammaBounds, SensitivityValue, anchor_at_one, gamma_bounds,
                            sensitivity_value)
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


def sensitivity_analysis(values, t, labels, X, y, terms, *, test, statistic: str,
                         estimand: str, alternative: str, alpha: float, gammas, adjusted,
                         risk_ratio, binary: bool, seed: int = 0,
                         measure: str = "difference") -> Sensitivity:
    """Every sensitivity view of one analysis.

    Parameters
    ----------
    values : array (n,)
        The values the headline test ran on (residuals for the adjusted statistics).
    t, labels, X, y : arrays
        The analysed rows: exposure, stratum labels, design matrix, outcome.
    terms : list
        The analysed covariate terms (benchmarks for the tipping grid).
    test : :class:`stratagap.inference.permutation.PermutationResult`
        The headline test. The side of its statistic relative to its null mean picks the
        direction of the bounds; when it ran on the statistic bounded here, its own one-sided
        p-value in that direction is the value at Gamma = 1.
    statistic : {"sum", "mean_difference"}
        The statistic the bounds are computed for.
    estimand, alternative, alpha, gammas
        As in :class:`stratagap.spec.AnalysisSpec`.
    adjusted, risk_ratio
        The headline estimate and (binary outcomes) the standardized risk ratio.
    binary : bool
        Whether the outcome is binary (picks the E-value's scale).
    measure : {"difference", "rr", "or"}
        The headline's scale. The tipping grid is on the difference scale for a difference and
        on the ratio scale otherwise (Lin, Psaty & Kronmal 1998 give the ratio form for risk
        ratios; an odds-ratio headline is bounded through its standardized risk ratio).
    seed : int
        Seed of the Monte Carlo estimates at the selected allocation (Gammas where the normal
        bracket straddles the level).

    Returns
    -------
    Sensitivity
    """
    # the sum statistic is not centred: its side is read against the null mean, not against 0
    direction = "greater" if test.statistic >= test.normal_mean else "less"
    same_statistic = test.statistic_name == statistic
    p_at_one = (test.p_greater if direction == "greater" else test.p_less) if same_statistic else None
    level = alpha / 2.0 if alternative == "two-sided" else alpha
    bounds = gamma_bounds(values, t, labels, estimand=estimand, statistic=statistic,
                          direction=direction, gammas=gammas, monte_carlo_level=level, seed=seed)
    if p_at_one is not None:
        bounds = anchor_at_one(bounds, p_at_one, test.engine)
    threshold = sensitivity_value(values, t, labels, estimand=estimand, statistic=statistic,
                                  direction=direction, alpha=alpha,
                                  two_sided=alternative == "two-sided", p_at_one=p_at_one,
                                  seed=seed)
    e_value = headline_e_value(adjusted, risk_ratio, y, t, binary=binary, alpha=alpha)
    scale = "difference" if measure == "difference" else "rr"
    ratio = adjusted if measure == "rr" else risk_ratio
    on = adjusted if scale == "difference" else ratio
    benchmarks = covariate_benchmarks(terms, X, y, t, measure=scale)
    tipping = tipping_grid(on.estimate, on.ci_low, on.ci_high, measure=scale,
                           benchmarks=benchmarks)
    return Sensitivity(e_value=e_value, gamma_threshold_detail=threshold,
                       gamma_level=threshold.alpha, gamma_direction=direction,
                       gamma_bounds=bounds, tipping=tipping)
