"""The one exception type for user errors, and the named warning classes.

Every check of user input raises :class:`InputError` with a one-line message that names the
column or argument, the rule, what was found and how to fix it. The CLI turns it into exit code
2 and that one line on stderr. Degenerate but legal data raise a subclass of
:class:`StratagapWarning`; the pipeline records every warning on the result and the report
shows them all.
"""

__all__ = [
    "InputError",
    "StratagapWarning",
    "DataWarning",
    "MissingDataWarning",
    "SeparationWarning",
    "OverlapWarning",
    "EstimandWarning",
    "StrataWarning",
    "BalanceWarning",
    "WeightWarning",
    "EngineWarning",
    "ModelWarning",
    "ClusterWarning",
]


class InputError(ValueError):
    """A problem with the user's data or arguments (CLI exit code 2)."""


class StratagapWarning(UserWarning):
    """Base class of every warning this package raises."""


class DataWarning(StratagapWarning):
    """A column was dropped, recoded or looks unusual (constant, ID-like, time-to-event)."""


class MissingDataWarning(StratagapWarning):
    """Missing values were dropped or handled in a way that may bias the result."""


class SeparationWarning(StratagapWarning):
    """The score model separated or did not converge; a penalized fit was used instead."""


class OverlapWarning(StratagapWarning):
    """Score distributions of the groups overlap poorly."""


class EstimandWarning(StratagapWarning):
    """Trimming or merging changed the population the estimate refers to."""


class StrataWarning(StratagapWarning):
    """Strata were merged, set aside or are too small for a chosen method."""


class BalanceWarning(StratagapWarning):
    """Covariates remain imbalanced after adjustment."""


class WeightWarning(StratagapWarning):
    """Extreme inverse-probability weights."""


class EngineWarning(StratagapWarning):
    """The resampling engine was changed or its approximation may matter."""


class ModelWarning(StratagapWarning):
    """An outcome model was simplified (interactions dropped, leverage 1, rank deficiency)."""


class ClusterWarning(StratagapWarning):
    """Clustering: few clusters, one-unit clusters, or a column that looks like an undeclared cluster."""
