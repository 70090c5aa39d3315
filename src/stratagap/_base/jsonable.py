"""The one conversion of result values to JSON-ready builtins (used by every ``to_dict()``)."""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["jsonable", "fields_dict"]


def jsonable(value: Any) -> Any:
    """Builtins only, NaN/inf as None, tuples as lists, objects via their to_dict()."""
    if hasattr(value, "to_dict") and not isinstance(value, (pd.DataFrame, pd.Series)):
        return jsonable(value.to_dict())
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if value is None or isinstance(value, str):
        return value
    return str(value)


def fields_dict(block, *, optional=()) -> dict:
    """A typed result block's fields in declaration order, JSON-ready.

    The field names are the ``results.json`` names, so this is the whole of a block's
    ``to_dict()``. Fields named in ``optional`` are left out while they are None: they are keys
    that ``results.json`` holds only when the analysis produced them.
    """
    out = {}
    for f in dataclasses.fields(block):
        name, value = f.name, getattr(block, f.name)
        if value is None and name in optional:
            continue
        out[name] = jsonable(value)
    return out
