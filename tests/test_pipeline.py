"""The whole pipeline through the Python API: contract fields, reproducibility, invariances."""

import json

import numpy as np
import pytest

import stratagap
from stratagap.result import to_json

from stratagap.demo import DEMO_COVARIATES

COVARIATES = list(DEMO_COVARIATES)


def _get(d, dotted):
    for part in dotted.split("."):
        d = d[part]
    return d


REQUIRED = ["n_used", "crude.estimate", "adjusted.estimate", "adjusted.ci_low", "adjusted.ci_high",
            "adjusted.measure", "test.p_value", "test.resamples", "balance.max_abs_smd_before",
            "balance.max_abs_smd_after", "strata", "sensitivity.e_value.point",
            "sensitivity.e_value.ci_limit", "sensitivity.gamma_threshold",
            "sensitivity.gamma_curve", "cross_checks", "verdict", "sensitivity.tipping",
            "flow.rows_read", "flow.rows_used", "adjusted.constant_effect", "test.engine",
            "test.null", "cautions"]


@pytest.mark.parametrize("field", REQUIRED)
def test_results_json_has_contract_fields(small_result, field):
    data = json.loads(to_json(small_result.to_dict()))
    _get(data, field)  # KeyError fails the test


def test_strata_list_has_counts_by_group(small_result):
    data = small_result.to_dict()
    assert len(data["strata"]) >= 2
    assert sum(s["n_exposed"] + s["n_reference"] for s in data["strata"]) == data["n_used"]
    assert data["flow"]["rows_used"] <= data["flow"]["rows_read"]


def test_gamma_curve_and_cross_checks_are_lists_of_records(small_result):
    data = small_result.to_dict()
    curve = data["sensitivity"]["gamma_curve"]
    assert curve[0]["gamma"] == 1.0 and "p_upper" in curve[0]
    assert all({"method", "estimate", "ci_low", "ci_high"} <= set(r) for r in data["cross_checks"])


def test_same_seed_same_bytes(shift_data):
    kw = dict(exposure="shift", exposed_value="nights", outcome="systolic_bp",
              covariates=COVARIATES, resamples=300, seed=9)
    a = stratagap.analyze(shift_data, **kw).to_json()
    b = stratagap.analyze(shift_data, **kw).to_json()
    assert a == b


def test_row_order_does_not_change_the_result(shift_data):
    kw = dict(exposure="shift", exposed_value="nights", outcome="systolic_bp",
              covariates=COVARIATES, resamples=300, seed=9)
    a = stratagap.analyze(shift_data, **kw).to_dict()
    shuffled = shift_data.sample(frac=1.0, random_state=3).reset_index(drop=True)
    b = stratagap.analyze(shuffled, **kw).to_dict()
    for key in ("adjusted", "test", "crude", "balance", "strata", "sensitivity"):
        assert json.dumps(a[key], sort_keys=True) == json.dumps(b[key], sort_keys=True), key


def test_batch_size_does_not_change_the_result(shift_data):
    kw = dict(exposure="shift", exposed_value="nights", outcome="systolic_bp",
              covariates=COVARIATES, resamples=600, seed=4)
    a = stratagap.analyze(shift_data, batch_size=7, **kw).to_dict()
    b = stratagap.analyze(shift_data, batch_size=600, **kw).to_dict()
    for d in (a, b):  # the batch size is recorded; nothing else may differ
        d["test"].pop("batch_size")
        d["test"]["studentized"].pop("batch_size")
    assert a["test"] == b["test"] and a["adjusted"] == b["adjusted"]


def test_binary_outcome_runs_with_ratio_measures(shift_data):
    data = shift_data.assign(high_bp=(shift_data["systolic_bp"] > 130).astype(int))
    res = stratagap.analyze(data, exposure="shift", exposed_value="nights", outcome="high_bp",
                            covariates=COVARIATES, resamples=300, measure="rr", seed=1)
    d = res.to_dict()
    assert d["adjusted"]["measure"] == "risk ratio"
    assert d["adjusted"]["mantel_haenszel"] is not None
    assert d["test"]["sum_statistic"]["p_value"] > 0
    assert d["adjusted"]["constant_effect"] is None


def test_att_estimand_labels_every_output(shift_data):
    res = stratagap.analyze(shift_data, exposure="shift", exposed_value="nights",
                            outcome="systolic_bp", covariates=COVARIATES, resamples=200,
                            estimand="att")
    d = res.to_dict()
    assert d["question"]["estimand"] == "ATT"
    assert "ATT" in d["question"]["population"]


def test_cautions_in_result_and_verdict(small_result):
    d = small_result.to_dict()
    assert any("not medical advice" in c.lower() for c in d["cautions"])
    assert "observational" in d["verdict"].lower()


def _pairs(seed=3, n_pairs=150):
    import pandas as pd
    rng = np.random.default_rng(seed)
    x = rng.normal(size=n_pairs).repeat(2) + rng.normal(0, 0.1, 2 * n_pairs)
    t = np.tile([1, 0], n_pairs)
    y = x + 0.5 * t + rng.normal(size=2 * n_pairs)
    return pd.DataFrame({"pair": np.arange(n_pairs).repeat(2), "t": t, "x": x, "y": y,
                         "yb": (y > 0.5).astype(int)})


def test_matched_pairs_as_user_strata_run_end_to_end():
    res = stratagap.analyze(_pairs(), exposure="t", outcome="y", covariates=["x"],
                            strata_column="pair", resamples=499)
    d = res.to_dict()
    assert len(d["strata"]) == 150 and d["n_used"] == 300
    assert "between-set variance" in d["adjusted"]["variance_method"]
    assert d["sensitivity"]["gamma_threshold"] >= 1.0
    assert any("studentized" in w["message"] for w in d["warnings"])


def test_matched_pairs_binary_sum_bound_at_gamma_one_is_the_exact_test():
    # Rosenbaum 2002, ch. 4: for pairs the bound at Gamma = 1 is the permutation distribution
    # itself, so it must equal the exact engine's one-sided p-value in the observed direction.
    res = stratagap.analyze(_pairs(), exposure="t", outcome="yb", covariates=["x"],
                            strata_column="pair", statistic="sum", resamples=499)
    d = res.to_dict()
    assert d["test"]["engine"] == "exact"
    bounds = d["sensitivity"]["gamma_bounds"]
    assert bounds["method"] == "exact"
    side = "p_greater" if d["sensitivity"]["gamma_direction"] == "greater" else "p_less"
    assert bounds["curve"][0]["p_upper"] == pytest.approx(d["test"][side], rel=1e-10)


# The pipeline's stages in the order they run (run.json "stages"; docs/results.md).
STAGES = ["data", "effects", "scores", "overlap", "strata", "balance", "tests", "cross_checks",
          "heterogeneity", "sensitivity", "negative_control", "verdict", "result"]


def test_run_records_wall_and_cpu_time_per_stage(small_result):
    stages = small_result.run["stages"]
    assert list(stages) == STAGES  # every stage is listed (negative_control near 0 without one)
    for name, spent in stages.items():
        assert set(spent) == {"wall", "cpu"} and spent["wall"] >= 0 and spent["cpu"] >= 0, name
    # the laps partition the run: their wall times add up to (at most) the whole run's
    assert sum(s["wall"] for s in stages.values()) <= small_result.run["seconds"] + 0.01
    assert stages["tests"]["wall"] > 0  # 999 resamples take measurable time
    data = small_result.to_dict()
    assert "stages" not in data and "seconds" not in data  # timings stay out of results.json
