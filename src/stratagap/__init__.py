"""stratagap: does the gap between two non-randomized groups survive adjustment?

Propensity scores, overlap and balance diagnostics, subclassification on the score, a
stratified permutation test within score strata (covariance-adjusted by default), the adjusted
effect with a confidence interval, cross-check estimators and a sensitivity analysis.

The subpackages follow the pipeline: ``data`` -> ``stratify`` -> ``inference`` -> ``estimation``
-> ``sensitivity`` -> ``result`` -> ``render``; ``pipeline.analyze`` wires them.

Observational evidence only; not medical advice.
"""

import importlib
import importlib.abc
import importlib.util
import sys
import warnings

from .errors import InputError, StratagapWarning

__all__ = ["analyze", "AnalysisResult", "AnalysisSpec", "InputError", "StratagapWarning"]
__version__ = "0.1.0"

# The statistical stages pull in statsmodels and scikit-learn; load them on first use (PEP 562)
# so that `stratagap --help` and one-line input errors answer at once.
_LAZY = {"analyze": ".pipeline", "AnalysisResult": ".result", "AnalysisSpec": ".spec"}

#: Module paths of release 0.1, kept for one release (each import warns once per process).
MOVED = {
    "_errors": "errors",
    "scores": "stratify.scores", "overlap": "stratify.overlap", "strata": "stratify.strata",
    "balance": "stratify.balance",
    "permutation": "inference.permutation",
    "effects": "estimation.effects", "heterogeneity": "estimation.heterogeneity",
    "crosscheck": "estimation.crosscheck",
    "verdict": "render.verdict", "summary": "render.summary", "tables": "render.tables",
    "output": "render.files", "report": "render.report",
}


class _MovedModuleFinder(importlib.abc.MetaPathFinder, importlib.abc.Loader):
    """Serve ``stratagap.<old>`` (and its submodules) as the module at its new path."""

    def __init__(self):
        self._real_specs = {}

    def find_spec(self, fullname, path=None, target=None):
        new = _new_name(fullname)
        if new is None:
            return None
        return importlib.util.spec_from_loader(fullname, self)

    def create_module(self, spec):
        new = _new_name(spec.name)
        warnings.warn(f"`{spec.name}` moved to `{new}` and the old path will be removed in the "
                      "next release; import the new path", DeprecationWarning, stacklevel=2)
        module = importlib.import_module(new)
        self._real_specs[spec.name] = module.__spec__
        return module

    def exec_module(self, module):
        # The module was executed under its new name; the import system has just stamped the
        # alias's spec on it, which would make a package look like a plain module: restore it.
        module.__spec__ = self._real_specs.pop(module.__spec__.name)


def _new_name(fullname):
    head, _, rest = fullname.partition(".")
    if head != __name__ or not rest:
        return None
    top, _, sub = rest.partition(".")
    if top not in MOVED:
        return None
    return ".".join(part for part in (__name__, MOVED[top], sub) if part)


if not any(isinstance(f, _MovedModuleFinder) for f in sys.meta_path):
    sys.meta_path.insert(0, _MovedModuleFinder())


def __getattr__(name):
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name], __name__), name)
    try:
        return importlib.import_module(f".{name}", __name__)  # subpackages: stratagap.data, ...
    except ModuleNotFoundError:
        raise AttributeError(f"module 'stratagap' has no attribute {name!r}") from None


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
