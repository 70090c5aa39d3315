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
from scipy import optimize, special, stats

from ._errors import InputError
from ._evalue import _jsonable

__all__ = ["GammaBounds", "SensitivityValue", "gamma_bounds", "sensitivity_value",
           "DEFAULT_GAMMAS", "GAMMA_CAP"]

DEFAULT_GAMMAS = (1.0, 1.1, 1.2, 1.3, 1.5, 1.75, 2.0, 2.5, 3.0, 4.0, 5.0, 7.5, 10.0)
#: Largest Gamma searched by :func:`sensitivity_value`; beyond it the result reads "> cap".
GAMMA_CAP = 1e3
#: Cells of the (class size x count) table above which the noncentral hypergeometric moments of
#: a stratum switch from exact sums to the large-stratum approximation.
EXACT_MOMENT_CELLS = 500_000
#: Multiply-adds of the exact convolution above which the binary bound uses the normal approximation.
EXACT_CONVOLUTION_BUDGET = 1e8

_METHOD_TEXT = {
    "exact": "exact: Fisher noncentral hypergeometric per stratum (u = outcome), exact convolution",
    "normal_binary": "normal approximation from the per-stratum noncentral hypergeometric moments (u = outcome)",
    "bracket": "normal approximation bracket: [separable (Gastwirth, Krieger & Rosenbaum 2000), conservative "
               "(per-stratum maximum mean and variance bound over all vertices)]",
}


# ----------------------------------------------------------------------------- results
@dataclass(frozen=True)
class GammaBounds:
    """Upper bounds on the one-sided p-value over a grid of Gamma.

    Attributes
    ----------
    gammas : list of float
    p_upper : list of float
        The bound to quote: the exact bound (method "exact"), the normal bound ("normal_binary"),
        or the conservative end of the bracket ("bracket").
    p_separable : list of float
        The separable value (lower end of the bracket; equals `p_upper` for the binary methods).
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

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in ("method", "method_text", "statistic", "direction", "estimand",
                                           "observed", "n_strata", "moments")}
        d["curve"] = [{"gamma": g, "p_upper": p, "p_separable": q}
                      for g, p, q in zip(self.gammas, self.p_upper, self.p_separable)]
        return _jsonable(d)


@dataclass(frozen=True)
class SensitivityValue:
    """The Gamma at which the one-sided p-value bound reaches alpha.

    Attributes
    ----------
    gamma : float
        Sensitivity value from the bound to quote (conservative end for a bracket); 1 when
        not significant at Gamma = 1, `cap` when the bound stays below alpha up to the cap.
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

    def to_dict(self) -> dict:
        return _jsonable({k: getattr(self, k) for k in self.__dataclass_fields__})


# ----------------------------------------------------------------------------- input
@dataclass
class _Design:
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


def _design(values, t, labels, estimand, statistic, sign):
    """Per-stratum sorted values and the linear map from exposed sums S_s to the statistic."""
    _, inv = np.unique(labels, return_inverse=True)
    n_s = np.bincount(inv)
    n1_s = np.bincount(inv, weights=t).astype(np.int64)
    n0_s = n_s - n1_s
    if statistic == "mean_difference" and ((n1_s == 0) | (n0_s == 0)).any():
        bad = int(np.flatnonzero((n1_s == 0) | (n0_s == 0))[0])
        raise InputError(f"`labels`: stratum {bad} lacks an exposed or a reference unit; the mean difference "
                         "needs both groups in every stratum (set such rows aside with label -1)")
    w = n_s / n_s.sum() if estimand == "ate" else n1_s / max(n1_s.sum(), 1)  # ATE n_s/n, ATT n1_s/n1
    v = sign * values
    S = np.bincount(inv, weights=v * t, minlength=len(n_s))
    R = np.bincount(inv, weights=v, minlength=len(n_s))
    with np.errstate(divide="ignore", invalid="ignore"):
        if statistic == "mean_difference":
            coef = w * (1.0 / n1_s + 1.0 / n0_s)  # T = sum w_s [S_s (1/n1s + 1/n0s) - R_s/n0s]
            const_s = -w * R / n0_s
        else:
            coef = np.ones(len(n_s))
            const_s = np.zeros(len(n_s))
    d = _Design(n_strata=len(n_s))
    d.observed = float(np.sum(coef * S + const_s))
    both = (n1_s > 0) & (n0_s > 0)
    # strata with one group only: their S_s is fixed by design
    d.const = float(np.sum(const_s) + np.sum((coef * S)[~both]))
    order = np.lexsort((v, inv))
    v_sorted, inv_sorted = v[order], inv[order]
    starts = np.concatenate(([0], np.cumsum(n_s)))
    keys = {}
    for s in np.flatnonzero(both):
        keys.setdefault((int(n_s[s]), int(n1_s[s])), []).append(s)
    for (n, n1), members in sorted(keys.items()):
        V = np.stack([v_sorted[starts[s]:starts[s + 1]] for s in members])
        d.groups.append((n, n1, V))
        d.coef.append(coef[members])
    return d


# ----------------------------------------------------------------------------- Fisher NCH
def _log_comb(a, b):
    return special.gammaln(a + 1.0) - special.gammaln(b + 1.0) - special.gammaln(a - b + 1.0)


def _nch_log_pmf(M, K, N, gamma, cache=None):
    """Log pmf rows of Fisher's noncentral hypergeometric count X of drawn units among K.

    P(X = x) is proportional to C(K, x) C(M - K, N - x) Gamma**x (Fisher's NCH; Rosenbaum
    2002, sec. 4.4). Returns (x, logp) with logp of shape (len(K), N + 1), -inf off support.
    The Gamma-free part is kept in `cache` (a dict) so a Gamma grid or a root search reuses it.
    """
    K = np.atleast_1d(np.asarray(K, dtype=float))
    key = (M, N, K.tobytes())
    base = None if cache is None else cache.get(key)
    x = np.arange(N + 1, dtype=float)
    if base is None:
        Kc = K[:, None]
        valid = (x[None, :] <= Kc) & (N - x[None, :] <= M - Kc)
        with np.errstate(invalid="ignore"):
            base = _log_comb(Kc, x[None, :]) + _log_comb(M - Kc, N - x[None, :])
        base = np.where(valid, base, -np.inf)
        if cache is not None:
            cache[key] = base
    logw = base + x[None, :] * math.log(gamma)
    logw -= logw.max(axis=1, keepdims=True)
    logw -= np.log(np.exp(logw).sum(axis=1, keepdims=True))
    return x, logw


def _nch_moments(M, K, N, gamma, cache=None):
    """Mean and variance of Fisher's NCH for each class size in K (exact or large-stratum).

    Exact by summation over the support when the table is small enough; otherwise the
    large-stratum approximation: the mean solves mu (M - K - N + mu) = Gamma (K - mu)(N - mu)
    and the variance is M/(M-1) / (1/mu + 1/(K-mu) + 1/(N-mu) + 1/(M-K-N+mu)) (Breslow & Day
    1980, sec. 4.4, from memory; both exact at Gamma = 1). Returns (mean, var, exact_flag).
    """
    K = np.asarray(K, dtype=float)
    # work with the smaller of the drawn and undrawn sets: X = K - (undrawn among K), odds 1/Gamma
    flip = N > M - N
    N2, g2 = (M - N, 1.0 / gamma) if flip else (N, gamma)
    if K.size * (N2 + 1) <= EXACT_MOMENT_CELLS:
        x, logp = _nch_log_pmf(M, K, N2, g2, cache)
        p = np.exp(logp)
        mean = p @ x
        var = np.maximum(p @ (x * x) - mean * mean, 0.0)
        # recompute the variance about the mean where cancellation could bite (mean^2 >> var)
        bad = var < 1e-8 * mean * mean
        if bad.any():
            var[bad] = np.einsum("kx,kx->k", p[bad], (x[None, :] - mean[bad, None]) ** 2)
        exact = True
    else:
        mean, var = _nch_moments_large(M, K, N2, g2)
        exact = False
    if flip:
        mean = K - mean
    return mean, np.maximum(var, 0.0), exact


def _nch_moments_large(M, K, N, gamma):
    lo, hi = np.maximum(0.0, N - (M - K)), np.minimum(K, N)
    if gamma == 1.0:
        mean = K * N / M
    else:
        # root of (1 - G) mu^2 + (M - K - N + G (K + N)) mu - G K N = 0 inside [lo, hi] (Breslow & Day 1980)
        a = 1.0 - gamma
        b = M - K - N + gamma * (K + N)
        c = -gamma * K * N
        disc = np.sqrt(np.maximum(b * b - 4 * a * c, 0.0))
        mean = np.where(b > 0, (2 * c) / (-b - disc), (-b + disc) / (2 * a))
        mean = np.clip(mean, lo, hi)
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = 1 / mean + 1 / (K - mean) + 1 / (N - mean) + 1 / (M - K - N + mean)
        var = np.where(hi > lo, M / (M - 1) / inv, 0.0)
    return mean, np.nan_to_num(var)


# ----------------------------------------------------------------------------- normal bracket
def _cut_moments(n, n1, V, gamma, cache=None):
    """Mean and variance of S_s for every cut vertex (top K sorted values have u = 1).

    Given the number X of exposed among the K units with u = 1 (Fisher NCH with odds Gamma),
    the exposed units within each u-class are a simple random sample, so
    E S = E X a1 + E(n1 - X) a0 and
    Var S = E[X(K-X)] SS1 / (K(K-1)) + E[Y(K'-Y)] SS0 / (K'(K'-1)) + (a1 - a0)^2 Var X,
    Y = n1 - X, K' = n - K (laws of total expectation and variance).
    Also returns the per-K variance upper and lower bounds valid for every vertex with K ones.
    """
    K = np.arange(n + 1, dtype=float)
    Kc = n - K
    EX, VX, exact = _nch_moments(n, K, n1, gamma, cache)
    EY = n1 - EX
    c1 = np.concatenate((np.zeros((V.shape[0], 1)), np.cumsum(V, axis=1)), axis=1)       # bottom-K sums
    c2 = np.concatenate((np.zeros((V.shape[0], 1)), np.cumsum(V * V, axis=1)), axis=1)
    tot1, tot2 = c1[:, -1:], c2[:, -1:]
    top1, top2 = tot1 - c1[:, ::-1], tot2 - c2[:, ::-1]                                  # top-K sums, K = 0..n
    with np.errstate(divide="ignore", invalid="ignore"):
        a1 = np.where(K > 0, top1 / K, 0.0)
        a0 = np.where(Kc > 0, (tot1 - top1) / Kc, 0.0)
        ss1 = np.where(K > 0, top2 - top1 * a1, 0.0)
        ss0 = np.where(Kc > 0, (tot2 - top2) - (tot1 - top1) * a0, 0.0)
        q1 = np.where(K > 1, (K * EX - VX - EX ** 2) / (K * (K - 1)), 0.0)
        q0 = np.where(Kc > 1, (Kc * EY - VX - EY ** 2) / (Kc * (Kc - 1)), 0.0)
        b1 = np.where(K > 0, c1[:, :] / K, 0.0)                                          # bottom-K mean
        b0 = np.where(Kc > 0, (tot1 - c1) / Kc, 0.0)
    q1, q0 = np.maximum(q1, 0.0), np.maximum(q0, 0.0)
    # a class of size <= 1 has SS = 0, so its multiplier is irrelevant: let it not loosen the bounds
    q1, q0 = np.where(K > 1, q1, np.where(Kc > 1, q0, 0.0)), np.where(Kc > 1, q0, np.where(K > 1, q1, 0.0))
    D = a1 - a0
    mu = EX * a1 + EY * a0
    var = q1 * np.maximum(ss1, 0.0) + q0 * np.maximum(ss0, 0.0) + VX * D * D
    # any vertex with K ones: SS1 + SS0 = SS_tot - (K K'/n) D^2 and D^2 <= the larger cut D^2
    ss_tot = np.maximum(tot2[:, 0] - tot1[:, 0] ** 2 / n, 0.0)[:, None]
    d2max = np.maximum(D * D, (b1 - b0) ** 2)
    qmax, qmin = np.maximum(q1, q0), np.minimum(q1, q0)
    kk = K * Kc / n
    var_hi = qmax * ss_tot + np.maximum(VX - qmax * kk, 0.0) * d2max
    # a class of one unit: D = (n/(n-1)) (v_i - vbar) for that unit i, so D^2 has a positive floor
    dev2 = ((V - V.mean(axis=1, keepdims=True)) ** 2).min(axis=1, keepdims=True) * (n / (n - 1.0)) ** 2
    d2min = np.where((K == 1) | (Kc == 1), np.minimum(dev2, d2max), 0.0)
    var_lo = np.minimum(qmin * ss_tot + (VX - qmin * kk) * d2min, qmin * ss_tot + (VX - qmin * kk) * d2max)
    return mu, var, var_hi, np.maximum(var_lo, 0.0), exact


def _perm_moments(n, n1, V):
    """Randomization mean and variance of S_s (Gamma = 1): n1 R/n and n1 n0/(n(n-1)) sum (v - vbar)^2."""
    R = V.sum(axis=1)
    ss = ((V - V.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    return n1 * R / n, n1 * (n - n1) / (n * (n - 1)) * ss


def _bracket_p(d, gamma, cache=None):
    """(separable p, conservative p, moments exact?) of the normal approximation at Gamma."""
    mu_sep = var_sep = mu_max = var_max = var_min = 0.0
    exact = True
    for (n, n1, V), c in zip(d.groups, d.coef):
        if gamma == 1.0:
            m, v = _perm_moments(n, n1, V)
            mu_sep += c @ m; var_sep += (c * c) @ v
            mu_max += c @ m; var_max += (c * c) @ v; var_min += (c * c) @ v
            continue
        mu, var, var_hi, var_lo, ex = _cut_moments(n, n1, V, gamma, cache)
        exact &= ex
        best = mu.max(axis=1, keepdims=True)
        tol = 1e-12 * np.maximum(np.abs(mu).max(axis=1, keepdims=True), 1.0)
        v_at = np.where(mu >= best - tol, var, -np.inf).max(axis=1)  # ties -> larger variance (GKR 2000)
        mu_sep += c @ best[:, 0]; var_sep += (c * c) @ v_at
        mu_max += c @ best[:, 0]; var_max += (c * c) @ var_hi.max(axis=1); var_min += (c * c) @ var_lo.min(axis=1)
    T = d.observed - d.const
    p_sep = _normal_sf(T - mu_sep, var_sep)
    diff = T - mu_max
    p_con = _normal_sf(diff, var_max if diff >= 0 else var_min)
    return p_sep, max(p_con, p_sep), exact


def _normal_sf(diff, var):
    if var <= 0.0:
        return 1.0  # no spread left to bound: report the uninformative bound, as the normal engine does
    return float(stats.norm.sf(diff / math.sqrt(var)))


# ----------------------------------------------------------------------------- binary exact
def _binary_setup(values, t, labels, sign):
    _, inv = np.unique(labels, return_inverse=True)
    y = values if sign > 0 else 1.0 - values            # "less": count exposed non-events
    n = np.bincount(inv)
    n1 = np.bincount(inv, weights=t).astype(np.int64)
    m = np.bincount(inv, weights=y).astype(np.int64)
    count = float(np.sum(y * t))
    return list(zip(n.tolist(), n1.tolist(), m.tolist())), count


def _stratum_pmf(n, n1, m, gamma):
    """Exposed events in one stratum under u = outcome: Fisher NCH(M=n, K=m, N=n1, odds Gamma)."""
    x, logp = _nch_log_pmf(n, [m], n1, gamma)
    lo, hi = max(0, n1 - (n - m)), min(m, n1)
    return lo, np.exp(logp[0, lo:hi + 1])


def _convolution_cost(raw):
    counts = {}
    for key in raw:
        counts[key] = counts.get(key, 0) + 1
    total_len, cost = 1, 0.0
    for (n, n1, m), k in counts.items():
        span = min(m, n1) - max(0, n1 - (n - m))
        if span == 1:
            cost += total_len * (k + 1)
        elif span > 1 and k == 1:
            cost += total_len * span
        elif span > 1:
            cost += (k * span) ** 2 + total_len * k * span  # repeated squaring, then one convolution
        total_len += k * span
    return cost


def _power(pmf, k):
    out, base = np.ones(1), pmf
    while k:
        if k & 1:
            out = np.convolve(out, base)
        k >>= 1
        if k:
            base = np.convolve(base, base)
    return out


def _binary_exact_p(raw, count, gamma):
    counts = {}
    for key in raw:
        counts[key] = counts.get(key, 0) + 1
    offset, pmf = 0, np.ones(1)
    for (n, n1, m), k in sorted(counts.items()):
        lo, p = _stratum_pmf(n, n1, m, gamma)
        offset += k * lo
        if p.size == 1:
            continue
        if p.size == 2:  # identical Bernoulli strata (discordant matched pairs): Binomial(k, p)
            part = stats.binom.pmf(np.arange(k + 1), k, p[1] / p.sum())
        else:
            part = _power(p, k)
        pmf = np.convolve(pmf, part)
    idx = int(math.ceil(count - offset - 1e-9))
    if idx <= 0:
        return 1.0
    return float(min(1.0, np.sum(pmf[idx:])))


def _binary_normal_p(raw, count, gamma, cache=None):
    mu = var = 0.0
    exact = True
    for n, n1, m in raw:
        if min(m, n1) == max(0, n1 - (n - m)):
            mu += min(m, n1)
            continue
        e, v, ex = _nch_moments(n, np.array([m]), n1, gamma, cache)
        mu += float(e[0]); var += float(v[0]); exact &= ex
    return _normal_sf(count - mu, var), exact


# ----------------------------------------------------------------------------- public
class _Bounder:
    """Callable p-value bound at one Gamma, prepared once for a data set."""

    def __init__(self, values, t, labels, estimand, statistic, direction):
        values, t, labels = _check(values, t, labels, estimand, statistic, direction)
        self.statistic, self.estimand = statistic, estimand
        if direction == "auto":
            d = _design(values, t, labels, estimand, statistic, 1.0)
            null_mean = sum(c @ _perm_moments(n, n1, V)[0] for (n, n1, V), c in zip(d.groups, d.coef))
            direction = "greater" if d.observed - d.const >= null_mean else "less"
        self.direction = direction
        sign = 1.0 if direction == "greater" else -1.0
        self.binary = statistic == "sum" and np.isin(values, (0.0, 1.0)).all()
        self.design = _design(values, t, labels, estimand, statistic, sign)
        self.moments = "exact"
        self._cache = {}
        if self.binary:
            self.raw, self.count = _binary_setup(values, t, labels, sign)
            self.method = "exact" if _convolution_cost(self.raw) <= EXACT_CONVOLUTION_BUDGET else "normal_binary"
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
        p_sep, p_con, ex = _bracket_p(self.design, gamma, self._cache)
        if not ex:
            self.moments = "large-stratum approximation"
        return p_con, p_sep


def _check_gammas(gammas):
    g = np.asarray(gammas, dtype=float).ravel()
    if g.size == 0 or not np.isfinite(g).all() or (g < 1.0).any():
        raise InputError(f"`gammas` must be finite values >= 1, got {list(np.asarray(gammas).ravel())[:5]}; "
                         "pass e.g. --gamma-grid 1,1.5,2,3")
    return sorted(set(g.tolist()))


def gamma_bounds(values, t, labels, *, estimand="ate", statistic="mean_difference", direction="greater",
                 gammas=DEFAULT_GAMMAS) -> GammaBounds:
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
    b = _Bounder(values, t, labels, estimand, statistic, direction)
    p_up, p_sep = zip(*(b(g) for g in gammas))
    return GammaBounds(gammas=list(gammas), p_upper=list(p_up), p_separable=list(p_sep), method=b.method,
                       method_text=_METHOD_TEXT[b.method], statistic=statistic, direction=b.direction,
                       estimand=estimand, observed=b.design.observed, n_strata=b.design.n_strata,
                       moments=b.moments)


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


def sensitivity_value(values, t, labels, *, estimand="ate", statistic="mean_difference", direction="auto",
                      alpha=0.05, two_sided=False, cap=GAMMA_CAP) -> SensitivityValue:
    """The Gamma at which the one-sided p-value bound reaches alpha (root finding on log Gamma).

    Parameters
    ----------
    values, t, labels, estimand, statistic, direction
        As for :func:`gamma_bounds`; the default direction "auto" is the side of the observed effect.
    alpha : float, default 0.05
        Level. With ``two_sided=True`` (the core test was two-sided) each side uses alpha/2.
    cap : float, default 1000
        Largest Gamma searched; beyond it the result is flagged "> cap".

    Returns
    -------
    SensitivityValue
        `gamma` from the bound to quote, `gamma_separable` from the separable end; for a bracket
        the true normal-approximation sensitivity value lies in [gamma, gamma_separable].

    References
    ----------
    Rosenbaum PR (2002). Observational Studies, 2nd ed., ch. 4. Springer.
    """
    try:
        alpha = float(alpha)
        cap = float(cap)
    except (TypeError, ValueError):
        raise InputError(f"`alpha` and `cap` must be numbers, got {alpha!r}, {cap!r}") from None
    if not 0.0 < alpha < 1.0:
        raise InputError(f"`alpha` must be in (0, 1), got {alpha}; use e.g. --alpha 0.05")
    if not (math.isfinite(cap) and cap > 1.0):
        raise InputError(f"`cap` must be a finite number > 1, got {cap}")
    level = alpha / 2.0 if two_sided else alpha
    note = (f"one-sided bound at alpha/2 = {level:g} per side (the core test is two-sided)" if two_sided
            else f"one-sided bound at alpha = {level:g}")
    b = _Bounder(values, t, labels, estimand, statistic, direction)
    g_up, flag_up = _root(lambda g: b(g)[0], level, cap)
    g_sep, flag_sep = _root(lambda g: b(g)[1], level, cap)
    return SensitivityValue(gamma=g_up, gamma_separable=g_sep, flag=flag_up, flag_separable=flag_sep,
                            alpha=level, alpha_note=note, cap=cap, p_at_gamma=b(g_up)[0], method=b.method,
                            statistic=statistic, direction=b.direction, estimand=estimand, moments=b.moments)
