"""Golden files: fixed analyses give the same results.json, balance.csv, strata.csv and summary.

The reference files in tests/golden/<case>/ were written by `python tests/golden/cases.py
--write` and change only on purpose (a commit of its own that says what moved and why). Floats
compare to 1e-12 relative (the same arithmetic in another order may differ in the last bits);
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

RTOL = 1e-12


def _same(a, b, where):
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, (int, float)) and isinstance(b, (int, float)), where
        assert math.isclose(a, b, rel_tol=RTOL, abs_tol=1e-300), f"{where}: {a!r} != {b!r}"
    elif isinstance(a, dict):
        assert isinstance(b, dict) and list(a) == list(b), f"{where}: keys {list(a)} != {list(b)}"
        for key in a:
            _same(a[key], b[key], f"{where}.{key}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), f"{where}: lengths differ"
        for i, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{where}[{i}]")
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
    """The comparison itself notices a change in the 12th significant digit and a renamed key."""
    with pytest.raises(AssertionError):
        _same({"a": 1.0}, {"a": 1.0 + 1e-11}, "x")
    with pytest.raises(AssertionError):
        _same({"a": 1.0}, {"b": 1.0}, "x")
    _same({"a": [1.0, "s"]}, {"a": [1.0 * (1 + 1e-14), "s"]}, "x")
