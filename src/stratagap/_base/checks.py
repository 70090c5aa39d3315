"""Input rules shared by several public entry points: one rule per parameter.

``alpha`` has two named variants, because it means two things:

- ``"analysis"``: the significance level of a whole analysis (the spec), in (0, 0.5]. A level
  above 0.5 would make a two-sided CI narrower than its point estimate's own sampling spread
  and is refused as a typo (common practice); numeric text is accepted (command line, TOML).
- ``"interval"``: the level of one interval or bound computed by a stage function, in (0, 1),
  a number.

Messages name the parameter, never a command-line flag: the command line maps parameters to
its flags (:func:`stratagap.cli.as_flags`).
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError

__all__ = ["check_alpha"]


def check_alpha(alpha, variant: str = "interval") -> float:
    """``alpha`` as a float, or an :class:`InputError` naming it."""
    if variant == "analysis":
        try:
            value = float(alpha)
        except (TypeError, ValueError):
            raise InputError(f"`alpha` must be a number in (0, 0.5]; got {alpha!r}") from None
        if not (0 < value <= 0.5):
            raise InputError(f"`alpha` must be a number in (0, 0.5]; got {alpha!r}, e.g. use 0.05")
        return value
    if variant != "interval":
        raise ValueError(f"unknown alpha variant {variant!r}")
    if isinstance(alpha, (bool, np.bool_)) or not isinstance(alpha, (int, float, np.integer, np.floating)) \
            or not math.isfinite(float(alpha)) or not 0 < float(alpha) < 1:
        raise InputError(f"`alpha` must be a number strictly between 0 and 1, got {alpha!r}; "
                         "use e.g. `alpha=0.05`")
    return float(alpha)
