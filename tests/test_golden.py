"""Golden files: fixed analyses give the same results.json, balance.csv, strata.csv and summary.

The reference files in tests/golden/<case>/ were written by `python tests/golden/cases.py
--write` and change only on purpose (a commit of its own that says what moved and why). Floats
compare to 1e-9 relative (see RTOL);
everything else compares exactly. No case may skip: causaldata is a test requirement.
"""

from __future__ import annotations

import csv
import io
import json
import math
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent / "golden"))
import cases as golden  # noqa: E402

# Another machine (another BLAS, another CPU) does the same arithmetic in another order, and the
# iterative fits (logistic scores, IRLS cross-checks) stop at slightly different points: seen up to
# 1e-12 relative on a fresh CI machine. 1e-9 relative leaves three orders of margin and still
# catches any change of method; 1e-14 absolute absorbs differences of equal numbers (0 vs 4e-16).
RTOL = 1e-9
ATOL = 1e-14


def _field_abs_tol(parent, key):
    """An absolute tolerance for fields whose last bits depend on the BLAS, or None.

    - The permutation mean of the statistic is zero by construction (residuals sum to zero in
      each stratum), so it comes out as rounding noise (about 1e-30) of either sign: compared on
      the scale of the null SD.
    - A summary of the null draws (mean, quantiles) near zero: same scale.
    - The p-value curve of the inverted test is a step function of tau evaluated on a grid whose
      ends come from root finding: a grid point may sit on a step, so one resample may count on
      the other side (two-sided step 2 / (B + 1)).
    """
    if key == "normal_mean" and isinstance(parent.get("normal_variance"), (int, float)):
        return RTOL * math.sqrt(abs(parent["normal_variance"]))
    if key == "null_summary" and isinstance(parent[key], dict) and "sd" in parent[key]:
        return RTOL * 10 * parent[key]["sd"]
    if key == "curve_p" and isinstance(parent.get("resamples"), int):
        return 2.0 / (parent["resamples"] + 1) + 1e-12
    return None


def _same(a, b, where, abs_tol=ATOL):
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, (int, float)) and isinstance(b, (int, float)), where
        assert math.isclose(a, b, rel_tol=RTOL, abs_tol=abs_tol), f"{where}: {a!r} != {b!r}"
    elif isinstance(a, dict):
        assert isinstance(b, dict) and list(a) == list(b), f"{where}: keys {list(a)} != {list(b)}"
        for key in a:
            tol = _field_abs_tol(a, key)
            _same(a[key], b[key], f"{where}.{key}", abs_tol if tol is None else tol)
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), f"{where}: lengths differ"
        for i, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{where}[{i}]", abs_tol)
    else:
        assert a == b, f"{where}: {a!r} != {b!r}"


def _cell(text):
    try:
        return float(text) if any(c in text for c in ".eE") else int(text)
    except ValueError:
        return text


def _rows(text):
    return [[_cell(c) for c in row] for row in csv.reader(io.StringIO(text))]


@pytest.fixture(scope="module", params=sorted(golden.cases()))
def case(request):
    return request.param, golden.render(request.param)


def test_results_json(case):
    name, files = case
    expected = json.loads((golden.HERE / name / "results.json").read_text(encoding="utf-8"))
    _same(json.loads(files["results.json"]), expected, f"{name}/results.json")


@pytest.mark.parametrize("file", ["balance.csv", "strata.csv"])
def test_tables(case, file):
    name, files = case
    expected = (golden.HERE / name / file).read_text(encoding="utf-8")
    _same(_rows(files[file]), _rows(expected), f"{name}/{file}")


def test_summary(case):
    name, files = case
    assert files["summary.txt"] == (golden.HERE / name / "summary.txt").read_text(encoding="utf-8")


def test_comparison_can_fail():
    """The comparison notices a change in the 8th significant digit, a renamed key, a moved
    near-zero mean beyond its scale and a curve point more than one step off."""
    with pytest.raises(AssertionError):
        _same({"a": 1.0}, {"a": 1.0 + 1e-8}, "x")
    with pytest.raises(AssertionError):
        _same({"normal_mean": 0.0, "normal_variance": 1.0},
              {"normal_mean": 1e-6, "normal_variance": 1.0}, "x")
    with pytest.raises(AssertionError):
        _same({"resamples": 999, "curve_p": [0.05]}, {"resamples": 999, "curve_p": [0.056]}, "x")
    _same({"resamples": 999, "curve_p": [0.05]}, {"resamples": 999, "curve_p": [0.052]}, "x")
    with pytest.raises(AssertionError):
        _same({"a": 1.0}, {"b": 1.0}, "x")
    _same({"a": [1.0, "s"]}, {"a": [1.0 * (1 + 1e-14), "s"]}, "x")
