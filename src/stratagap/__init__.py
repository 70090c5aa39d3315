"""stratagap: does the gap between two non-randomized groups survive adjustment?

Propensity scores, overlap and balance diagnostics, subclassification on the score, a
stratified permutation test within score strata (covariance-adjusted by default), the adjusted
effect with a confidence interval, cross-check estimators and a sensitivity analysis.

Observational evidence only; not medical advice.
"""

import importlib

from ._errors import InputError, StratagapWarning

__all__ = ["analyze", "AnalysisResult", "AnalysisSpec", "InputError", "StratagapWarning"]
__version__ = "0.1.0"

# The statistical stages pull in statsmodels and scikit-learn; load them on first use (PEP 562)
# so that `stratagap --help` and one-line input errors answer at once.
_LAZY = {"analyze": ".pipeline", "AnalysisResult": ".result", "AnalysisSpec": ".spec"}


def __getattr__(name):
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name], __name__), name)
    try:
        return importlib.import_module(f".{name}", __name__)  # submodules: stratagap.data, ...
    except ModuleNotFoundError:
        raise AttributeError(f"module 'stratagap' has no attribute {name!r}") from None


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
