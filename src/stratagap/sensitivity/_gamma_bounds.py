"""Rosenbaum-type bounds on the one-sided p-value of the stratified permutation test.

Sensitivity model (Rosenbaum 2002, ch. 4): within stratum s the design fixes n1s exposed
units, and an unobserved u in [0, 1] makes the chance of an exposed set A proportional to
Gamma ** sum(u_i, i in A). Gamma = 1 is the randomization distribution of the core test.

Two bounds, always of the statistic the core test reported:

* binary values and the ``"sum"`` statistic (exposed events): the worst case is u = outcome;
  each stratum's count is Fisher's noncentral hypergeometric with odds Gamma and the strata are
  combined by exact convolution (matched pairs: Binomial(D, Gamma / (1 + Gamma)) over the D
  discordant pairs), or by the normal approximation when the convolution is too large;
* any values with ``"mean_difference"`` (the default covariance-adjusted statistic on residuals,
  which are fixed under the sharp null) or ``"sum"``: a normal-approximation bracket. The lower
  end is the asymptotically separable value (Gastwirth, Krieger & Rosenbaum 2000): per stratum
  the cut vertex u = (0..0, 1..1) of the sorted values with the largest mean (ties: largest
  variance). The upper end is conservative and provable: per stratum the largest mean over all
  vertices (attained at a cut) and an upper bound on the variance over all vertices, combined.
  For many small strata the two ends nearly meet; for a few large strata they bracket the
  normal-approximation worst case. The upper end is not the one-step Taylor bound of
  Rosenbaum (2018).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from .._base.checks import check_alpha
from ..errors import InputError
from .._base.layout import layout_for
from ..inference import Statistic
from ._nchyper import _normal_sf, _perm_moments
from . import _gamma_monte_carlo as _mc
from ._gamma_results import GammaBounds, SensitivityValue, anchor_at_one
from ._gamma_pairs import PairsBound, is_pairs
from ._gamma_search import CutSearch, search_cuts
from ._gamma_binary import _binary_exact_p, _binary_normal_p, _binary_setup, _convolution_cost

__all__ = ["GammaBounds", "SensitivityValue", "gamma_bounds", "sensitivity_value", "anchor_at_one",
           "DEFAULT_GAMMAS", "GAMMA_CAP"]

DEFAULT_GAMMAS = (1.0, 1.1, 1.2, 1.3, 1.5, 1.75, 2.0, 2.5, 3.0, 4.0, 5.0, 7.5, 10.0)
#: Largest Gamma searched by :func:`sensitivity_value`; beyond it the result reads "> cap".
GAMMA_CAP = 1e3
#: Multiply-adds of the exact convolution above which the binary bound uses the normal approximation.
EXACT_CONVOLUTION_BUDGET = 1e8

_METHOD_TEXT = {
    "exact": "exact: Fisher noncentral hypergeometric per stratum (u = outcome), exact convolution",
    "normal_binary": "normal approximation from the per-stratum noncentral hypergeometric moments (u = outcome)",
    "pairs_exact": "exact for matched pairs: each pair puts probability Gamma / (1 + Gamma) on its larger "
                   "value (the worst case; Rosenbaum 2002, ch. 4), tail by exact convolution",
    "pairs_monte_carlo": "matched pairs: draws from the worst-case allocation (each pair puts probability "
                         "Gamma / (1 + Gamma) on its larger value; Rosenbaum 2002, ch. 4), an unbiased "
                         "estimate of the bound; the normal approximation with its exact moments beside it",
    "pairs_normal": "matched pairs: normal approximation with the exact moments of the worst-case allocation "
                    "(each pair puts probability Gamma / (1 + Gamma) on its larger value; Rosenbaum 2002, "
                    "ch. 4); too many pairs to draw from it within the budget",
    "bracket": "normal approximation over cut allocations (u = 1 on the j largest values of each stratum; "
               "Rosenbaum & Krieger 1990): the worst allocation found by a search from the separable one "
               "(Gastwirth, Krieger & Rosenbaum 2000), quoted, with a provable upper end beside it",
}


# ----------------------------------------------------------------------------- input
@dataclass
class _LinearForm:
    groups: list = field(default_factory=list)   # [(n, n1, V (G, n) sorted)] for strata with both groups
    coef: list = field(default_factory=list)     # per group: (G,) weight of S_s in T
    const: float = 0.0                           # T = sum coef * S + const
    observed: float = 0.0
    n_strata: int = 0


def _check(values, t, labels, estimand, statistic, direction):
    values = np.asarray(values, dtype=float)
    t = np.asarray(t)
    labels = np.asarray(labels)
    if values.ndim != 1 or t.shape != values.shape or labels.shape != values.shape:
        raise InputError(f"`values`, `t` and `labels` must be 1-D of one length, got shapes {values.shape}, "
                         f"{t.shape}, {labels.shape}")
    if estimand not in ("ate", "att"):
        raise InputError(f"`estimand` must be 'ate' or 'att', got {estimand!r}")
    if statistic not in ("mean_difference", "sum"):
        raise InputError(f"`statistic` must be 'mean_difference' or 'sum', got {statistic!r}; the bound is of "
                         "the statistic the core test reported")
    if direction not in ("greater", "less", "auto"):
        raise InputError(f"`direction` must be 'greater', 'less' or 'auto', got {direction!r}")
    if not np.isin(t, (0, 1)).all():
        raise InputError("`t` must hold only 0 (reference) and 1 (exposed); recode the exposure")
    if not np.issubdtype(labels.dtype, np.integer) or (labels < -1).any():
        raise InputError("`labels` must be integer strata 0..S-1 with -1 for rows set aside")
    keep = labels >= 0
    if not np.isfinite(values[keep]).all():
        raise InputError("`values` has missing or infinite entries among analysed rows; drop or impute them first")
    if keep.sum() == 0:
        raise InputError("`labels` sets every row aside (-1); nothing to bound")
    return values[keep], t[keep].astype(np.int8), labels[keep].astype(np.int64)


def _linear_form(values, t, layout, statistic, sign):
    """Per-stratum sorted values and the linear map from exposed sums S_s to the statistic."""
    inv = layout.codes
    n_s, n1_s = layout.n.astype(np.int64), layout.n1.astype(np.int64)
    both = layout.has_both_groups()
    if statistic == "mean_difference" and not both.all():
        bad = int(np.flatnonzero(~both)[0])
        raise InputError(f"`labels`: stratum {bad} lacks an exposed or a reference unit; the mean difference "
                         "needs both groups in every stratum (set such rows aside with label -1)")
    v = sign * values
    S = layout.exposed_sums(v[:, None], t)[0]
    # T = sum_s (coef_s S_s + const_s), the core test's statistic in linear form
    coef, const_s = Statistic.of(statistic, layout, v[:, None]).linear_form()
    d = _LinearForm(n_strata=layout.n_strata)
    d.observed = float(np.sum(coef * S + const_s))
    # strata with one group only: their S_s is fixed by design
    d.const = float(np.sum(const_s) + np.sum((coef * S)[~both]))
    order = np.lexsort((v, inv))
    v_sorted = v[order]
    starts = np.concatenate(([0], np.cumsum(n_s)))
    keys = {}
    for s in np.flatnonzero(both):
        keys.setdefault((int(n_s[s]), int(n1_s[s])), []).append(s)
    for (n, n1), members in sorted(keys.items()):
        V = np.stack([v_sorted[starts[s]:starts[s + 1]] for s in members])
        d.groups.append((n, n1, V))
        d.coef.append(coef[members])
    return d


def _bracket_p(d, gamma, cache=None):
    """The normal approximation over cut allocations at Gamma: (separable p, search).

    ``search`` is the :class:`~._gamma_search.CutSearch` (best attained tail, provable end,
    the allocation); at Gamma = 1 every allocation gives the randomization p-value.
    """
    if gamma == 1.0:
        mu = var = 0.0
        for (n, n1, V), c in zip(d.groups, d.coef):
            m, v = _perm_moments(n, n1, V)
            mu += c @ m; var += (c * c) @ v
        p = _normal_sf(d.observed - d.const - mu, var)
        return p, CutSearch(p_attained=p, p_provable=p, p_separable=p, cuts=[], exact=True, moments_exact=True,
                            kappa_steps=0, single_steps=0)
    found = search_cuts(d, gamma, cache)
    return found.p_separable, found


# ----------------------------------------------------------------------------- binary exact
class _Bounder:
    """Callable p-value bound at one Gamma, prepared once for a data set."""

    def __init__(self, values, t, labels, estimand, statistic, direction, layout=None, seed=0):
        values, t, labels = _check(values, t, labels, estimand, statistic, direction)
        self.statistic, self.estimand = statistic, estimand
        layout = layout_for(layout, labels, t, estimand)  # rows set aside: dropped by _check
        if direction == "auto":
            d = _linear_form(values, t, layout, statistic, 1.0)
            null_mean = sum(c @ _perm_moments(n, n1, V)[0] for (n, n1, V), c in zip(d.groups, d.coef))
            direction = "greater" if d.observed - d.const >= null_mean else "less"
        self.direction = direction
        sign = 1.0 if direction == "greater" else -1.0
        self.binary = statistic == "sum" and np.isin(values, (0.0, 1.0)).all()
        self.form = _linear_form(values, t, layout, statistic, sign)
        self.moments = "exact"
        self._cache = {}
        self._searches = {}
        if self.binary:
            self.raw, self.count = _binary_setup(values, t, layout, sign)
            self.method = "exact" if _convolution_cost(self.raw) <= EXACT_CONVOLUTION_BUDGET else "normal_binary"
        elif is_pairs(self.form):  # matched pairs: the worst case is known exactly
            self.pairs = PairsBound(self.form, seed=seed)
            self.method = self.pairs.method
        else:
            self.method = "bracket"

    def __call__(self, gamma):
        """(p_upper, p_separable) at Gamma."""
        if self.method == "exact":
            p = _binary_exact_p(self.raw, self.count, gamma)
            return p, p
        if self.method == "normal_binary":
            p, ex = _binary_normal_p(self.raw, self.count, gamma, self._cache)
            if not ex:
                self.moments = "large-stratum approximation"
            return p, p
        if self.method.startswith("pairs"):  # quoted: the worst case; beside it, its normal value
            return self.pairs(gamma), self.pairs.normal(gamma)
        return self.search(gamma).p_attained, self._searches[float(gamma)][0]

    def search(self, gamma) -> CutSearch:
        """The bracket's search over cut allocations at Gamma (kept: the curve, the root and
        the Monte Carlo step ask for the same Gamma more than once)."""
        key = float(gamma)
        if key not in self._searches:
            p_sep, found = _bracket_p(self.form, key, self._cache)
            if not found.moments_exact:
                self.moments = "large-stratum approximation"
            self._searches[key] = (p_sep, found)
        return self._searches[key][1]

    def provable(self, gamma) -> float:
        """The provable upper end at Gamma (the quoted bound itself for every other method)."""
        return self.search(gamma).p_provable if self.method == "bracket" else self(gamma)[0]


def _check_gammas(gammas):
    g = np.asarray(gammas, dtype=float).ravel()
    if g.size == 0 or not np.isfinite(g).all() or (g < 1.0).any():
        raise InputError(f"`gammas` must be finite values >= 1, got {list(np.asarray(gammas).ravel())[:5]}; "
                         "pass e.g. `gamma_grid=1,1.5,2,3`")
    return sorted(set(g.tolist()))


def gamma_bounds(values, t, labels, *, estimand="ate", statistic="mean_difference", direction="greater",
                 gammas=DEFAULT_GAMMAS, layout=None, monte_carlo_level=None, seed=0) -> GammaBounds:
    """Upper bounds on the one-sided p-value of the stratified test for each Gamma.

    Parameters
    ----------
    values : (n,) float
        The values the core test used: residuals from ``permutation.residualize`` for the
        covariance-adjusted "mean_difference" statistic, the outcome itself for "sum".
    t : (n,) int8
        1 exposed, 0 reference.
    labels : (n,) int64
        Strata 0..S-1 (propensity strata, or user strata such as matched pairs); -1 ignored.
    estimand : {"ate", "att"}, default "ate"
        Stratum weights of the mean difference: ATE n_s/n, ATT n1_s/n1.
    statistic : {"mean_difference", "sum"}, default "mean_difference"
        T = sum_s w_s (mean exposed - mean reference), or the sum over exposed units.
    direction : {"greater", "less", "auto"}, default "greater"
        Tail bounded; "less" bounds P(T <= t) by applying the bound to -values; "auto" takes the
        side of the observed effect.
    gammas : sequence of float >= 1
    layout : :class:`stratagap._base.layout.StratumLayout`, optional
        The caller's layout of the rows with ``labels >= 0``; None builds it here.
    monte_carlo_level : float, optional
        With a bracket, at each Gamma > 1 where the separable value and the provable end fall
        on either side of this level, add a Monte Carlo p-value at the allocation the search
        selects (:mod:`stratagap.sensitivity._gamma_monte_carlo`), seeded from ``seed``.

    Returns
    -------
    GammaBounds

    Notes
    -----
    At Gamma = 1 the bracket equals the randomization normal p-value of the statistic, with
    E S_s = n1s R_s / n_s and Var S_s = n1s n0s / (n_s (n_s - 1)) sum (v - vbar_s)^2; the
    binary exact bound equals the exact permutation p-value (Fisher's exact test for one 2x2).

    References
    ----------
    Rosenbaum PR (2002). Observational Studies, 2nd ed., ch. 4. Springer.
    Gastwirth JL, Krieger AM, Rosenbaum PR (2000). Asymptotic separability in sensitivity
    analysis. JRSS B 62:545-555.
    Breslow NE, Day NE (1980). Statistical Methods in Cancer Research I, sec. 4.4 (large-stratum
    moments of the noncentral hypergeometric; from memory). IARC, Lyon.
    """
    gammas = _check_gammas(gammas)
    b = _Bounder(values, t, labels, estimand, statistic, direction, layout, seed=seed)
    p_up, p_sep = zip(*(b(g) for g in gammas))
    p_prov = [b.provable(g) for g in gammas]
    exact_at = [b.search(g).exact for g in gammas] if b.method == "bracket" else None
    p_mc, mc = None, None
    if b.method == "pairs_monte_carlo":
        mc = {"label": "Monte Carlo from the worst-case allocation (matched pairs)",
              "resamples": b.pairs.resamples,
              "mc_se": {str(g): b.pairs.mc_se.get(float(g), 0.0) for g in gammas if g > 1.0},
              "meaning": "an unbiased estimate of the bound (p_upper); p_separable is the normal "
                         "approximation with the exact moments of the same allocation",
              "where": "every Gamma"}
    if monte_carlo_level is not None and b.method == "bracket":
        where = _mc.disagreeing(gammas, p_prov, p_sep, monte_carlo_level)
        if where:
            got = _mc.monte_carlo_at_allocation(b.form, where, seed=seed, cache=b._cache,
                                                cuts=[b.search(g).cuts for g in where])
            at = dict(zip(where, got["p"]))
            p_mc = [at.get(g) for g in gammas]
            pairs = all(n == 2 for n, _n1, _V in b.form.groups)
            mc = {"label": _mc.LABEL, "resamples": got["resamples"],
                  "mc_se": dict(zip((str(g) for g in where), got["mc_se"])),
                  "level": monte_carlo_level,
                  "meaning": ("an unbiased estimate of the bound (matched pairs: the selected "
                              "allocation is the worst case)") if pairs else
                             ("the p-value at one allocation of hidden bias: a lower estimate of "
                              "the worst case, shown beside the normal bracket"),
                  "where": "each Gamma > 1 at which the bracket's ends fall on either side of the level"}
    return GammaBounds(gammas=list(gammas), p_upper=list(p_up), p_separable=list(p_sep), method=b.method,
                       method_text=_METHOD_TEXT[b.method], statistic=statistic, direction=b.direction,
                       estimand=estimand, observed=b.form.observed, n_strata=b.form.n_strata,
                       moments=b.moments, p_monte_carlo=p_mc, monte_carlo=mc,
                       p_provable=list(p_prov), exact_at=exact_at)


def _root(f, alpha, cap):
    """Gamma where f(Gamma) = alpha, by brentq on log Gamma; (gamma, flag)."""
    p1 = f(1.0)
    if p1 > alpha:
        return 1.0, "not significant at Gamma=1"
    if f(cap) < alpha:
        return cap, "> cap"
    if p1 == alpha:
        return 1.0, "ok"
    lg = optimize.brentq(lambda x: f(math.exp(x)) - alpha, 0.0, math.log(cap), xtol=1e-14, rtol=1e-14,
                         maxiter=200)
    gamma = math.exp(lg)
    if abs(f(gamma) - alpha) > 1e-8:
        # the separable end can jump when the maximizing vertex changes; the root is that jump
        return gamma, "ok (the bound jumps across alpha at this Gamma)"
    return gamma, "ok"


def _root_from_test(f, alpha, cap, p_at_one):
    """:func:`_root` with the test's own p-value at Gamma = 1 when given."""
    if p_at_one is None:
        return _root(f, alpha, cap)
    if p_at_one > alpha:
        return 1.0, "not significant at Gamma=1"
    if f(1.0) > alpha:  # the normal bound disagrees with the test at Gamma = 1 itself
        return 1.0, "significant at Gamma=1 only"
    return _root(f, alpha, cap)


def sensitivity_value(values, t, labels, *, estimand="ate", statistic="mean_difference", direction="auto",
                      alpha=0.05, two_sided=False, cap=GAMMA_CAP, layout=None,
                      p_at_one=None, seed=0) -> SensitivityValue:
    """The Gamma at which the one-sided p-value bound reaches alpha (root finding on log Gamma).

    Parameters
    ----------
    values, t, labels, estimand, statistic, direction, layout
        As for :func:`gamma_bounds`; the default direction "auto" is the side of the observed effect.
    alpha : float, default 0.05
        Level. With ``two_sided=True`` (the core test was two-sided) each side uses alpha/2.
    cap : float, default 1000
        Largest Gamma searched; beyond it the result is flagged "> cap".
    p_at_one : float, optional
        The test's own one-sided p-value (same statistic, same direction). At Gamma = 1 the
        sensitivity model is the randomization distribution, so this is the exact value of the
        bound there; given, it decides significance at Gamma = 1 instead of the normal
        approximation. If the test is significant but the bound is already above the level just
        past Gamma = 1, the sensitivity value is 1 (flag "significant at Gamma=1 only").

    Returns
    -------
    SensitivityValue
        `gamma` from the bound to quote, `gamma_separable` from the separable end; for a bracket
        the true normal-approximation sensitivity value lies in [gamma, gamma_separable].

    References
    ----------
    Rosenbaum PR (2002). Observational Studies, 2nd ed., ch. 4. Springer.
    """
    alpha = check_alpha(alpha)
    try:
        cap = float(cap)
    except (TypeError, ValueError):
        raise InputError(f"`cap` must be a number, got {cap!r}") from None
    if not (math.isfinite(cap) and cap > 1.0):
        raise InputError(f"`cap` must be a finite number > 1, got {cap}")
    level = alpha / 2.0 if two_sided else alpha
    note = (f"one-sided bound at alpha/2 = {level:g} per side (the core test is two-sided)" if two_sided
            else f"one-sided bound at alpha = {level:g}")
    b = _Bounder(values, t, labels, estimand, statistic, direction, layout, seed=seed)
    g_up, flag_up = _root_from_test(lambda g: b(g)[0], level, cap, p_at_one)
    g_sep, flag_sep = _root_from_test(lambda g: b(g)[1], level, cap, p_at_one)
    g_prov, flag_prov = (g_up, flag_up) if b.method != "bracket" else _root_from_test(
        b.provable, level, cap, p_at_one)
    if b.method == "pairs_monte_carlo" and flag_up.startswith("ok ("):
        # the estimate from fixed draws is a step function of Gamma: its root sits at a step
        flag_up = "ok (Monte Carlo estimate, a step function of Gamma: the root is at a step)"
    return SensitivityValue(gamma=g_up, gamma_separable=g_sep, flag=flag_up, flag_separable=flag_sep,
                            alpha=level, alpha_note=note, cap=cap, p_at_gamma=b(g_up)[0], method=b.method,
                            statistic=statistic, direction=b.direction, estimand=estimand, moments=b.moments,
                            gamma_provable=g_prov, flag_provable=flag_prov)
