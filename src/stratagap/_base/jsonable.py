"""The one conversion of result values to JSON-ready builtins (used by every ``to_dict()``)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["jsonable"]

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
