"""docs/results.md describes every field name that appears in results.json."""

import re
from pathlib import Path

DOC = Path(__file__).resolve().parents[1] / "docs" / "results.md"
# Keys below these paths are data-derived (covariate names, quantile labels), not field names.
DYNAMIC = {"propensity.coefficients", "flow.dropped_missing_by_column", "null_summary.quantiles"}


def _names(value, path=""):
    if isinstance(value, dict):
        for key, item in value.items():
            here = f"{path}.{key}" if path else key
            yield key
            if any(here.endswith(d) for d in DYNAMIC):
                continue
            yield from _names(item, here)
    elif isinstance(value, list):
        for item in value[:3]:
            yield from _names(item, path)


def test_every_field_name_is_documented(small_result):
    documented = set(re.findall(r"`([^`]+)`", DOC.read_text(encoding="utf-8")))
    names = set(_names(small_result.to_dict()))
    missing = sorted(n for n in names if n not in documented)
    assert not missing, f"document these results.json fields in docs/results.md: {missing}"
