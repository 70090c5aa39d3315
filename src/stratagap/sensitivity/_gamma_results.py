"""The Gamma bounds' results: the curve over a grid of Gamma and the sensitivity value.

Also :func:`anchor_at_one`, which puts the test's own p-value at Gamma = 1.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

from .._base.jsonable import jsonable as _jsonable

__all__ = ["GammaBounds", "SensitivityValue", "anchor_at_one"]


@dataclass(frozen=True)
class GammaBounds:
    """Upper bounds on the one-sided p-value over a grid of Gamma.

    Attributes
    ----------
    gammas : list of float
    p_upper : list of float
        The bound to quote: the exact bound (method "exact"), the normal bound ("normal_binary"),
        the exact worst case of matched pairs ("pairs_exact") or its Monte Carlo estimate
        ("pairs_monte_carlo"), or the worst cut allocation found ("bracket",
        :mod:`._gamma_search`).
    p_provable : list of float
        An upper end the worst case over cut allocations provably does not exceed ("bracket");
        the quoted bound itself for every other method. Where it equals ``p_upper``
        (``exact_at``), the quoted value is the worst case over cut allocations.
    p_separable : list of float
        The separable value (lower end of the bracket; equals `p_upper` for the binary methods;
        for pairs, the normal approximation at the worst-case allocation).
    method : str
        "exact", "normal_binary" or "bracket"; `method_text` says it in words.
    statistic, direction, estimand : str
    observed : float
        The observed statistic, on the scale of the requested direction (negated for "less").
    n_strata : int
    moments : str
        "exact" or "large-stratum approximation" (noncentral hypergeometric moments).
    """

    gammas: list
    p_upper: list
    p_separable: list
    method: str
    method_text: str
    statistic: str
    direction: str
    estimand: str
    observed: float
    n_strata: int
    moments: str = "exact"
    at_one: str = "bound"  # "bound", or where the Gamma = 1 value came from (see anchor_at_one)
    p_monte_carlo: list | None = None  # per Gamma: None, or the estimate at the selected allocation
    monte_carlo: dict | None = None    # label, resamples, mc_se per Gamma, what the number means
    p_provable: list | None = None     # per Gamma (None only for results built by hand)
    exact_at: list | None = None       # "bracket": per Gamma, do the quoted and provable ends agree?

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in ("method", "method_text", "statistic", "direction", "estimand",
                                           "observed", "n_strata", "moments", "at_one", "monte_carlo")}
        mc = self.p_monte_carlo or [None] * len(self.gammas)
        prov = self.p_provable or list(self.p_upper)
        exact = self.exact_at or [None] * len(self.gammas)
        d["curve"] = [{"gamma": g, "p_upper": p, "p_provable": r, "p_separable": q,
                       "p_monte_carlo": m, **({} if e is None else {"exact": e})}
                      for g, p, r, q, m, e in zip(self.gammas, self.p_upper, prov, self.p_separable,
                                                  mc, exact)]
        return _jsonable(d)


@dataclass(frozen=True)
class SensitivityValue:
    """The Gamma at which the one-sided p-value bound reaches alpha.

    Attributes
    ----------
    gamma : float
        Sensitivity value from the bound to quote (for a bracket, the worst cut allocation
        found); 1 when not significant at Gamma = 1, `cap` when the bound stays below alpha up
        to the cap.
    gamma_provable : float
        The same from the provable end (at most `gamma`; equals it for every other method).
    gamma_separable : float
        The same from the separable value (upper end of the Gamma bracket; equals `gamma` for
        the binary methods).
    flag : str
        "ok", "not significant at Gamma=1" or "> cap" (for `gamma`); "ok (the bound jumps across
        alpha at this Gamma)" when the bound is discontinuous at the root (separable end only).
    flag_separable : str
    alpha : float
        The one-sided level used; `alpha_note` says whether it is alpha or alpha/2 per side.
    p_at_gamma : float
        The bound evaluated at `gamma` (equals alpha when flag is "ok").
    """

    gamma: float
    gamma_separable: float
    flag: str
    flag_separable: str
    alpha: float
    alpha_note: str
    cap: float
    p_at_gamma: float
    method: str
    statistic: str
    direction: str
    estimand: str
    moments: str = "exact"
    gamma_provable: float | None = None
    flag_provable: str | None = None

    def to_dict(self) -> dict:
        return _jsonable({k: getattr(self, k) for k in self.__dataclass_fields__})


def anchor_at_one(bounds: GammaBounds, p_at_one: float, engine: str) -> GammaBounds:
    """The curve anchored at the test's own one-sided p-value.

    At Gamma = 1 the sensitivity model is the randomization distribution of the test, so the
    test's p-value (from whatever engine it used) is the value there. The worst-case p-value
    does not decrease as Gamma grows (a larger Gamma allows every allocation a smaller one
    allows; Rosenbaum 2002, sec. 4.3), so for Gamma > 1 each end of the normal bracket is
    raised to at least that value.
    """
    p_up = [p_at_one if g == 1.0 else max(p, p_at_one) for g, p in zip(bounds.gammas, bounds.p_upper)]
    p_sep = [p_at_one if g == 1.0 else max(p, p_at_one)
             for g, p in zip(bounds.gammas, bounds.p_separable)]
    p_prov = None if bounds.p_provable is None else [
        p_at_one if g == 1.0 else max(p, p_at_one) for g, p in zip(bounds.gammas, bounds.p_provable)]
    return replace(bounds, p_upper=p_up, p_separable=p_sep, p_provable=p_prov,
                   at_one=f"the test's own one-sided p-value ({engine} engine); for Gamma > 1 "
                          "at least that value")
