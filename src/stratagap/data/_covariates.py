"""The covariate design of the data stage: coding, formula terms, balance terms, rank check.

Numeric covariates are kept as they are; categorical ones (text, category, bool) are one-hot
coded with the first level in sorted order as the reference, which is dropped from ``X`` but
kept as a balance row. A Wilkinson formula (formulaic) replaces this coding when given. Design
columns that are constant or linear combinations of earlier ones are dropped (Gram-Schmidt on
the centred, scaled columns, so the implied intercept counts).

References
----------
Groenwold RHH, White IR, Donders ART, et al. (2012). Missing covariate data in clinical research:
when and when not to use the missing-indicator method for analysis. CMAJ 184(11):1265-1269.
"""

from __future__ import annotations

import ast
import re
import warnings
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
import pandas as pd

from ..errors import DataWarning, InputError, MissingDataWarning
from . import _splines

MISSING_LEVEL = "(missing)"


@dataclass(frozen=True)
class BalanceTerm:
    """One balance row: a numeric covariate, a dummy level, or a formula design column.

    ``column`` indexes ``X`` (None when the row is not a design column, e.g. the reference level
    of a categorical or a collinear column that was dropped); ``values`` always holds the row's
    values for the analysed rows (float64), so balance can use it in both cases.
    """

    name: str
    covariate: str
    level: str | None
    kind: str
    column: int | None
    values: np.ndarray | None = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict:
        return {"name": self.name, "covariate": self.covariate, "level": self.level,
                "kind": self.kind, "column": self.column}


class Design(NamedTuple):
    X: np.ndarray
    names: list
    terms: list
    covariates: list
    reference_levels: dict
    dropped: list
    #: the first ``n_linear`` columns of ``X`` are the linear design (one column per numeric
    #: covariate, the dummies); spline columns follow them
    n_linear: int = 0
    #: how each numeric covariate entered (:class:`SplineTerm`); empty for a formula
    forms: tuple = ()


def level_label(covariate, level) -> str:
    """The one spelling of a dummy level in every table, figure, file and message: "role: nurse"."""
    return f"{covariate}: {level}"


def fmt(v) -> str:
    """Text form of a value: integral floats without ``.0``, everything else ``str``."""
    if isinstance(v, (float, np.floating)) and np.isfinite(v) and float(v).is_integer():
        return str(int(v))
    if isinstance(v, np.generic):
        v = v.item()
    return str(v)


def clean_formula(formula):
    """Right-hand side of ``formula`` (a leading ``~`` is accepted; a left-hand side is not)."""
    if formula is None:
        return None
    if not isinstance(formula, str) or not formula.strip():
        raise InputError(f"`formula` must be a non-empty formula string, got {formula!r}")
    if "~" in formula:
        lhs, formula = formula.split("~", 1)
        if lhs.strip():
            raise InputError(f"`formula` takes only the right-hand side (e.g. 'age + I(age**2)'); "
                             f"drop '{lhs.strip()} ~' (the outcome is `outcome`)")
    return formula.strip()


def formula_variables(formula) -> list:
    """Data columns the formula uses, in order of first appearance.

    Plain terms are looked up by name; in Python terms (``I(age**2)``, ``bs(x, df=3)``) every
    bare name that is neither called nor the base of an attribute (``np`` in ``np.log``) is a
    column. Backticks quote names that are not identifiers.
    """
    from formulaic import Formula
    from formulaic.errors import FormulaicError

    formula = clean_formula(formula)
    try:
        terms = list(Formula(formula))
    except (FormulaicError, SyntaxError, ValueError) as err:
        raise InputError(f"`formula` could not be parsed ({_first_line(err)}); check its syntax") from None
    found = []
    for term in terms:
        for factor in term.factors:
            method = getattr(factor.eval_method, "value", str(factor.eval_method))
            if method == "lookup":
                found.append(str(factor.expr))
            elif method == "python":
                found.extend(_python_names(str(factor.expr)))
    found = list(dict.fromkeys(found))
    return sorted(found, key=lambda v: (formula.find(v) if v in formula else len(formula), v))


def _python_names(expr: str) -> list:
    quoted = re.findall(r"`([^`]+)`", expr)
    expr = re.sub(r"`[^`]+`", "_q_", expr)
    try:
        tree = ast.parse(expr, mode="eval")
    except SyntaxError:
        raise InputError(f"`formula` term '{expr}' is not a valid expression; check its syntax") from None
    skip = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            skip.add(id(node.func))
        elif isinstance(node, ast.Attribute):
            skip.add(id(node.value))
    names = [n.id for n in ast.walk(tree) if isinstance(n, ast.Name) and id(n) not in skip and n.id != "_q_"]
    return quoted + names


def identifier_levels(k: int, n: int) -> bool:
    """A text column with this many distinct values in ``n`` rows is an identifier, not a factor."""
    return n >= 3 and (k == n or (k > 50 and k > 0.5 * n))


def is_categorical(s: pd.Series) -> bool:
    return pd.api.types.is_bool_dtype(s) or not pd.api.types.is_numeric_dtype(s)


def fill_missing(frame: pd.DataFrame, covariates, formula, missing):
    """Apply the missing-indicator method to ``covariates`` (only when ``missing="indicator"``)."""
    if missing != "indicator":
        return frame, formula
    frame, filled = frame.copy(), []
    for c in covariates:
        m = frame[c].isna()
        if not m.any():
            continue
        filled.append(c)
        in_c = formula is not None and re.search(r"C\(\s*`?" + re.escape(str(c)) + r"`?\s*[,)]", formula)
        if is_categorical(frame[c]) or in_c:
            frame[c] = [MISSING_LEVEL if pd.isna(v) else fmt(v) for v in frame[c].astype(object)]
        else:
            frame[f"{c}__missing"] = m.to_numpy(dtype=np.float64)
            frame[c] = frame[c].astype(np.float64).fillna(0.0)
            if formula is not None:
                formula = f"{formula} + `{c}__missing`"
    if filled:
        warnings.warn(f"`missing=indicator`: missing values of {', '.join(map(repr, filled))} were filled "
                      "(numeric: 0 plus a <col>__missing indicator; categorical: a '(missing)' level); this "
                      "biases estimates when the covariate is a confounder (Groenwold et al. 2012, CMAJ)",
                      MissingDataWarning, stacklevel=3)
    return frame, formula


def build(frame: pd.DataFrame, covariates, formula, t, terms: str = "spline") -> Design:
    """Design matrix, names and balance terms for the analysed rows in ``frame``.

    ``terms="spline"`` adds natural cubic spline columns for each continuous numeric covariate
    after the linear design (see :mod:`._splines`); ``"linear"`` keeps one column per
    covariate. A formula overrides both.
    """
    n = len(frame)
    kept, constant = [], []
    for c in covariates:
        s = frame[c]
        k = int(s.nunique(dropna=True))
        if k <= 1:
            constant.append(c)
            warnings.warn(f"covariate '{c}' is constant in the analysed rows ({fmt(s.dropna().iloc[0]) if k else 'all missing'}); "
                          "dropped from the design", DataWarning, stacklevel=3)
            continue
        if k == 2 and len(set(zip(pd.factorize(s)[0].tolist(), np.asarray(t).tolist()))) == 2:
            raise InputError(f"`covariates` column '{c}' is the exposure recoded (its two values match the groups "
                             "exactly); remove it from the covariates")
        if is_categorical(s) and not pd.api.types.is_bool_dtype(s) and identifier_levels(k, n):
            raise InputError(f"`covariates` column '{c}' looks like an identifier ({k} distinct values in {n} rows); "
                             "remove it from the covariates (or group it into a few categories)")
        _check_separation(c, s, t)
        why = _identifier_reason(c, s, frame.get("__row__"))
        if why:
            warnings.warn(f"covariate '{c}' looks like a row identifier ({why}); remove it "
                          "unless it is a real measurement", DataWarning, stacklevel=3)
        kept.append(c)
    if not kept:
        raise InputError("no covariates are left after dropping constant ones "
                         f"({', '.join(map(repr, constant))}); name covariates that vary")
    forms = ()
    if formula is not None:
        X, names, bterms = _formula_design(frame, formula)
        refs, n_linear = {}, X.shape[1]
    else:
        X, names, bterms, refs = _plain_design(frame, kept)
        n_linear = X.shape[1]
        if terms == "spline":
            X, names, forms = _add_splines(frame, X, names, bterms)
        else:
            forms = tuple(_splines.SplineTerm(tm.covariate, "linear") for tm in bterms
                          if tm.level is None and tm.kind == "continuous" and tm.column is not None)
    terms = bterms
    bad = ~np.isfinite(X).all(axis=0)
    if bad.any():
        j = int(np.flatnonzero(bad)[0])
        raise InputError(f"`formula` design column '{names[j]}' has {int((~np.isfinite(X[:, j])).sum())} "
                         "non-finite values (e.g. log of 0); change the formula or the data")
    keep, const = independent_columns(X)
    dropped = [names[j] for j in np.flatnonzero(~keep)]
    for j in np.flatnonzero(~keep):
        if const[j] and any(c in names[j] for c in constant):
            continue  # already reported as a constant covariate
        why = "constant" if const[j] else "a linear combination of earlier columns (collinear)"
        warnings.warn(f"design column '{names[j]}' is {why} in the analysed rows; dropped from the design",
                      DataWarning, stacklevel=3)
    new_index = np.cumsum(keep) - 1
    terms = [BalanceTerm(tm.name, tm.covariate, tm.level, tm.kind,
                         None if tm.column is None or not keep[tm.column] else int(new_index[tm.column]), tm.values)
             for tm in terms if tm.column is None or not const[tm.column]]
    X = np.ascontiguousarray(X[:, keep])
    n_linear = int(keep[:n_linear].sum())
    if X.shape[1] == 0:
        raise InputError("no usable design columns remain (all constant or collinear); name covariates that vary")
    terms = [tm if tm.column is None else BalanceTerm(tm.name, tm.covariate, tm.level, tm.kind, tm.column,
                                                      X[:, tm.column]) for tm in terms]
    return Design(X, [n_ for n_, k in zip(names, keep) if k], terms, kept, refs, dropped,
                  n_linear, forms)


def _add_splines(frame, X, names, bterms):
    """Append each continuous covariate's nonlinear spline columns after the linear design.

    Knots come from the covariate's observed values (rows a missing indicator marks are left
    out, their filled 0 is not a measurement); a covariate whose knots collapse warns by name.
    """
    cols, new_names, forms = [], [], []
    for tm in bterms:
        if tm.level is not None or tm.kind != "continuous" or tm.column is None:
            continue
        x = X[:, tm.column]
        ind = f"{tm.covariate}__missing"
        observed = x if ind not in frame.columns else x[frame[ind].to_numpy() == 0]
        knots, note = _splines.choose_knots(observed, len(x))
        if note:
            warnings.warn(f"covariate '{tm.covariate}': {note}; use `formula` to choose its terms",
                          DataWarning, stacklevel=4)
        if not knots:
            forms.append(_splines.SplineTerm(tm.covariate, "linear", (), note))
            continue
        forms.append(_splines.SplineTerm(tm.covariate, "spline", knots, note))
        extra = _splines.nonlinear_columns(x, knots)
        cols.append(extra)
        new_names.extend(f"{tm.covariate}: spline {j + 1}" for j in range(extra.shape[1]))
    if cols:
        X = np.column_stack([X, *cols])
    return X, names + new_names, tuple(forms)


def _plain_design(frame, covariates):
    cols, names, terms, refs = [], [], [], {}
    for c in covariates:
        s = frame[c]
        if is_categorical(s):
            codes, uniques = pd.factorize(s, use_na_sentinel=True)
            order = _sorted_levels(range(len(uniques)), list(uniques))
            refs[c] = fmt(uniques[order[0]])
            for i, k in enumerate(order):
                v = (codes == k).astype(np.float64)
                lev = uniques[k]
                name = level_label(c, fmt(lev))
                if i == 0:
                    terms.append(BalanceTerm(name, c, fmt(lev), "binary", None, v))
                    continue
                terms.append(BalanceTerm(name, c, fmt(lev), "binary", len(cols), v))
                cols.append(v)
                names.append(name)
        else:
            v = s.to_numpy(dtype=np.float64)
            terms.append(BalanceTerm(c, c, None, _kind(v), len(cols), v))
            cols.append(v)
            names.append(c)
        ind = f"{c}__missing"
        if ind in frame.columns:
            v = frame[ind].to_numpy(dtype=np.float64)
            terms.append(BalanceTerm(level_label(c, MISSING_LEVEL), c, MISSING_LEVEL, "binary",
                                     len(cols), v))
            cols.append(v)
            names.append(level_label(c, MISSING_LEVEL))
    return np.column_stack(cols), names, terms, refs


def _formula_design(frame, formula):
    from formulaic import Formula
    from formulaic.errors import FormulaicError

    try:
        with np.errstate(all="ignore"):  # non-finite results are reported below, by column
            mm = Formula(formula).get_model_matrix(frame, ensure_full_rank=True, na_action="raise")
    except (FormulaicError, SyntaxError, ValueError, TypeError, NameError) as err:
        raise InputError(f"`formula` could not be applied to the data ({_first_line(err)}); "
                         "check the formula's terms and columns") from None
    all_names = [str(c) for c in mm.columns]
    M = np.asarray(mm.to_numpy(dtype=np.float64))
    cols, names, terms = [], [], []
    for term, idx in mm.model_spec.term_indices.items():
        tname = str(term)
        for j in idx:
            if all_names[j] == "Intercept":
                continue
            name = all_names[j]
            level = None
            if name.startswith(tname + "[") and name.endswith("]"):
                level = name[len(tname) + 1:-1]
                level = level[2:] if level.startswith("T.") else level
            terms.append(BalanceTerm(name, tname, level, _kind(M[:, j]), len(cols), M[:, j]))
            cols.append(M[:, j])
            names.append(name)
    X = np.column_stack(cols) if cols else np.empty((len(frame), 0))
    return X, names, terms


def _check_separation(name, s: pd.Series, t) -> None:
    """Refuse a numeric covariate whose group ranges do not meet: no overlap is possible.

    A penalized flexible score model can give such groups slightly overlapping scores, so the
    score's overlap rule alone does not catch it.
    """
    if is_categorical(s) or s.nunique(dropna=True) < 3:
        return
    v = s.to_numpy(dtype=float, na_value=np.nan)
    t = np.asarray(t)
    v1, v0 = v[(t == 1) & np.isfinite(v)], v[(t == 0) & np.isfinite(v)]
    if v1.size == 0 or v0.size == 0:
        return
    if v1.min() > v0.max() or v0.min() > v1.max():
        raise InputError(f"`covariates` column '{name}' separates the groups completely (exposed "
                         f"{fmt(v1.min())} to {fmt(v1.max())}, reference {fmt(v0.min())} to "
                         f"{fmt(v0.max())}): no overlap; remove it or rethink the comparison")


#: Column names that usually hold record numbers (common practice; matched whole, any case).
_ID_NAME = re.compile(r"(?i)(.*[_ .])?(id|ids|pid|patid|subjid|studyid|seqn|seqno|recno|record|"
                      r"rowid|row|index|idx)([_ .]?(no|num|number))?")


def _identifier_reason(name, s: pd.Series, original_row) -> str | None:
    """Why a numeric covariate looks like a record number, or None.

    Integer-valued and unique per row, and either consecutive once sorted, monotone in the
    file's original row order (``original_row``: each analysed row's position in the input), or
    named like an identifier (id, seqn, patient_id, ...).
    """
    if is_categorical(s) or len(s) < 20:
        return None
    v = pd.to_numeric(s, errors="coerce").to_numpy(dtype=float)
    if not np.isfinite(v).all() or np.any(v != np.round(v)) or np.unique(v).size != v.size:
        return None
    n = v.size
    if np.all(np.diff(np.sort(v)) == 1):
        return f"{n} distinct consecutive integers in {n} rows"
    if original_row is not None:
        in_file_order = v[np.argsort(np.asarray(original_row), kind="stable")]
        steps = np.diff(in_file_order)
        if np.all(steps > 0) or np.all(steps < 0):
            return f"{n} distinct integers in {n} rows, monotone in the file's row order"
    if _ID_NAME.fullmatch(str(name)):
        return f"{n} distinct integers in {n} rows, and named like an identifier"
    return None


def independent_columns(X, tol: float = 1e-6):
    """Keep mask (columns not constant nor collinear with earlier ones) and constant mask.

    Modified Gram-Schmidt with one re-orthogonalization pass on the centred, unit-norm
    columns; a column is redundant when less than ``tol`` of its norm is left after projecting
    out the kept ones (and the intercept, by the centring). O(n p^2).
    """
    n, p = X.shape
    Xc = X - X.mean(axis=0)
    norms = np.linalg.norm(Xc, axis=0)
    scale = np.maximum(np.abs(X).max(axis=0, initial=0.0), 1.0) * np.sqrt(max(n, 1))
    const = norms <= 1e-12 * scale
    keep = np.zeros(p, bool)
    Q = np.empty((n, 0))
    for j in range(p):
        if const[j]:
            continue
        v = Xc[:, j] / norms[j]
        for _ in range(2):
            v = v - Q @ (Q.T @ v)
        r = np.linalg.norm(v)
        if r > tol:  # share of the unit-norm column not explained by the kept ones
            keep[j] = True
            Q = np.column_stack([Q, v / r])
    return keep, const


def _kind(v) -> str:
    u = np.unique(v[np.isfinite(v)])
    return "binary" if np.isin(u, (0.0, 1.0)).all() else "continuous"


def _sorted_levels(index, values) -> list:
    """``index`` sorted by ``values`` (natural order; by text form when types do not compare)."""
    try:
        return sorted(index, key=lambda i: values[i])
    except TypeError:
        return sorted(index, key=lambda i: fmt(values[i]))


def _first_line(err) -> str:
    text = re.sub(r"\x1b\[[0-9;]*m|⧛|⧚", "", str(err)).strip()
    return text.splitlines()[0] if text else type(err).__name__
