"""stratagap: does the gap between two non-randomized groups survive adjustment?

Propensity scores, overlap and balance diagnostics, subclassification on the score, a
stratified permutation test within score strata (covariance-adjusted by default), the adjusted
effect with a confidence interval, cross-check estimators and a sensitivity analysis.

Observational evidence only; not medical advice.
"""

from ._errors import InputError, StratagapWarning
from .pipeline import analyze
from .result import AnalysisResult
from .spec import AnalysisSpec

__all__ = ["analyze", "AnalysisResult", "AnalysisSpec", "InputError", "StratagapWarning"]
__version__ = "0.1.0"
