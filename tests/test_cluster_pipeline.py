"""``cluster=`` end to end: API, JSON, CLI, report, bad input and the undeclared-cluster warning.

The statistical pieces are checked against independent values in tests/inference/test_clusters.py
(enumeration), tests/sensitivity/test_gamma_clusters.py (enumeration) and
tests/estimation/test_cluster_robust.py (statsmodels, hand computation, closed forms); the
calibration is in tests/test_cluster_calibration.py.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import stratagap
from stratagap.cli import main
from stratagap.errors import InputError

try:
    from .cluster_study import hospitals
except ImportError:
    from cluster_study import hospitals


@pytest.fixture(scope="module")
def data():
    return hospitals(np.random.default_rng(7), 30, 8, 20, 1.0, "cluster")


def _run(data, **kw):
    return stratagap.analyze(data, exposure="t", outcome="y", covariates=["x", "h"],
                             resamples=499, seed=3, **kw)


@pytest.fixture(scope="module")
def clustered(data):
    return _run(data, cluster="hospital")


def test_cluster_level_block_and_test(clustered, data):
    d = clustered.to_dict()
    block = d["clusters"]
    assert block["level"] == "cluster" and block["test_level"] == "clusters"
    sizes = data.groupby("hospital").size()
    assert block["patients_per_cluster"]["min"] == sizes.min()
    assert block["patients_per_cluster"]["max"] == sizes.max()
    per = data.groupby("hospital")["t"].first()
    assert block["clusters_by_group"] == {"exposed": int(per.sum()),
                                          "reference": int((1 - per).sum())}
    assert "clusters as the units" in d["test"]["statistic_label"]
    # the test ran over clusters: its log10 assignments count clusters, not rows
    assert d["test"]["log10_assignments"] < np.log10(2.0) * 30
    assert d["adjusted"]["constant_effect"] is None
    assert block["intervals"][0]["ci_low"] == d["adjusted"]["ci_low"]
    assert "CR2" in d["adjusted"]["method"]
    assert block["few_clusters"] and "primary inference" in block["caution"]
    assert any("Few clusters" in w["message"] for w in d["warnings"])
    assert {r["stratum"] for r in block["design"]["strata"]} == {r["stratum"] for r in d["strata"]}
    assert sum(r["n"] for r in d["strata"]) == d["n_used"]  # strata tables count rows
    # the Gamma bounds are of the cluster-level test: at Gamma = 1 its normal one-sided p
    bounds = d["sensitivity"]["gamma_bounds"]
    side = "normal_p_greater" if bounds["direction"] == "greater" else "normal_p_less"
    assert bounds["curve"][0]["gamma"] == 1.0
    assert bounds["curve"][0]["p_upper"] == pytest.approx(d["test"][side], rel=1e-9)
    assert bounds["n_strata"] == len(d["strata"])
    assert block["test_weights"].startswith("rows (patients) weighted equally")


def test_json_is_deterministic_and_row_order_free(clustered, data):
    shuffled = data.sample(frac=1.0, random_state=1).reset_index(drop=True)
    again = _run(shuffled, cluster="hospital")
    assert again.to_json() == clustered.to_json()
    json.loads(clustered.to_json())


def test_without_cluster_the_warning_names_the_column(data):
    d = _run(data).to_dict()
    assert "clusters" not in d and "cluster" not in d["spec"]
    hits = [w for w in d["warnings"] if w["kind"] == "ClusterWarning"]
    assert len(hits) == 1 and "'hospital'" in hits[0]["message"]
    assert "`cluster=hospital`" in hits[0]["message"]


def test_unit_level_exposure_keeps_the_unit_test(data):
    mixed = hospitals(np.random.default_rng(8), 40, 8, 20, 1.0, "unit")
    plain = _run(mixed)
    res = _run(mixed, cluster="hospital")
    d = res.to_dict()
    assert d["clusters"]["level"] == "unit" and d["clusters"]["test_level"] == "units"
    assert d["test"]["p_value"] == plain.to_dict()["test"]["p_value"]
    assert d["adjusted"]["estimate"] == pytest.approx(plain.adjusted.estimate, rel=1e-12)
    assert any("varies within" in w["message"] for w in d["warnings"])
    with pytest.raises(InputError, match="varies within .* clusters"):
        _run(mixed, cluster="hospital", cluster_level="cluster")


def test_bad_cluster_columns(data):
    bad = data.copy()
    bad.loc[[3, 10], "hospital"] = None
    with pytest.raises(InputError, match=r"missing in 2 rows \(data rows 4, 11"):
        _run(bad, cluster="hospital")
    ids = data.assign(row=np.arange(len(data)))
    with pytest.raises(InputError, match="identifies rows, not clusters"):
        _run(ids, cluster="row")
    one = data.copy()
    one["t"] = (one["hospital"] == one["hospital"].iloc[0]).astype(int)
    with pytest.raises(InputError, match="single cluster"):
        _run(one, cluster="hospital")
    with pytest.raises(InputError, match="`statistic=studentized`"):
        _run(data, cluster="hospital", statistic="studentized")
    with pytest.raises(InputError, match="also the exposure"):
        _run(data, cluster="x")


def test_clusters_of_one_row_warn(data):
    extra = data.copy()
    extra.loc[0, "hospital"] = "solo-1"
    extra.loc[1, "hospital"] = "solo-2"
    extra.loc[[0, 1], "t"] = [1, 0]
    d = _run(extra, cluster="hospital", cluster_level="auto").to_dict()
    assert any("hold a single row" in w["message"] for w in d["warnings"])


def test_cli_cluster_end_to_end(tmp_path, data, capsys):
    path = tmp_path / "wards.csv"
    data.to_csv(path, index=False)
    out = tmp_path / "out"
    code = main(["analyze", str(path), "--exposure", "t", "--outcome", "y", "--covariates", "x,h",
                 "--cluster", "hospital", "--resamples", "199", "--out", str(out)])
    assert code == 0
    text = capsys.readouterr().out
    assert "clusters (hospital):" in text and "level of clusters" in text
    saved = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert saved["clusters"]["column"] == "hospital"
    html = next(out.glob("*.html")).read_text(encoding="utf-8")
    assert "sg-cluster-table" in html and "Not cluster-robust" in html
    code = main(["analyze", str(path), "--exposure", "t", "--outcome", "y", "--covariates", "x,h",
                 "--cluster", "nope"])
    assert code == 2
    assert "`--cluster` column 'nope'" in capsys.readouterr().err


def test_every_cluster_field_is_documented(clustered):
    import re
    from pathlib import Path

    doc = Path(__file__).resolve().parents[1] / "docs" / "results.md"
    documented = set(re.findall(r"`([^`]+)`", doc.read_text(encoding="utf-8")))

    def names(value, path=""):
        if isinstance(value, dict):
            for key, item in value.items():
                yield key
                if not key.endswith("coefficients"):  # keys are design column names
                    yield from names(item, f"{path}.{key}")
        elif isinstance(value, list):
            for item in value[:3]:
                yield from names(item, path)

    d = clustered.to_dict()
    found = set(names({"clusters": d["clusters"], "strata": d["strata"], "spec": d["spec"]}))
    balance_keys = set(names(d["balance"]))
    missing = sorted(n for n in found - balance_keys if n not in documented)
    assert not missing, f"document these fields in docs/results.md: {missing}"


def test_strata_of_few_clusters_are_capped_with_a_warning():
    few = hospitals(np.random.default_rng(5), 16, 5, 12, 0.5, "cluster")
    d = _run(few, cluster="hospital").to_dict()
    per = few.groupby("hospital")["t"].first()
    k1, k0 = int(per.sum()), int((1 - per).sum())
    cap = max(1, min(16 // 6, min(k1, k0) // 2))
    assert cap < 5 and len(d["strata"]) <= cap
    assert any(f"at most {cap} strata" in w["message"] for w in d["warnings"])
