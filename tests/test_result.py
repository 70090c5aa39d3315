"""The typed result blocks: each one's to_dict() survives JSON unchanged, is exactly the block
that results.json holds, and holds no key the block does not declare."""

import dataclasses
import json

import numpy as np
import pytest

import stratagap
from stratagap.demo import DEMO_COVARIATES
from stratagap.estimation.heterogeneity import Heterogeneity, heterogeneity_across_strata
from stratagap.result import ParticipantFlow, PermutationTests, PreparedSummary
from stratagap.sensitivity.analysis import Sensitivity
from stratagap.sensitivity.negative_control import NegativeControl

# block attribute on AnalysisResult -> (its key in results.json, its class)
BLOCKS = {"tests": ("test", PermutationTests), "flow": ("flow", ParticipantFlow),
          "heterogeneity": ("heterogeneity", Heterogeneity),
          "sensitivity": ("sensitivity", Sensitivity),
          "negative_control": ("negative_control", NegativeControl)}


@pytest.fixture(scope="module")
def binary_result(shift_data):
    frame = shift_data.assign(high_bp=(shift_data["systolic_bp"] > 135).astype(int))
    return stratagap.analyze(frame, exposure="shift", exposed_value="nights", outcome="high_bp",
                             covariates=list(DEMO_COVARIATES), resamples=199, seed=3,
                             negative_control="hearing_db")


@pytest.fixture(params=["continuous", "binary"])
def result(request, small_result, binary_result):
    return small_result if request.param == "continuous" else binary_result


def _declared(block) -> set:
    """The keys a block may put in its to_dict(): its field names, with the documented twists."""
    names = {f.name for f in dataclasses.fields(block)}
    if isinstance(block, PermutationTests):  # the headline test's own fields open the block
        return (names - {"main"}) | set(block.main.to_dict())
    if isinstance(block, Sensitivity):  # repeated at the top of the block for readers
        return names | {"gamma_threshold", "gamma_curve"}
    return names


@pytest.mark.parametrize("attribute", sorted(BLOCKS))
def test_block_is_typed_and_round_trips_through_json(result, attribute):
    key, cls = BLOCKS[attribute]
    block = getattr(result, attribute)
    assert isinstance(block, cls) and dataclasses.is_dataclass(block)
    with pytest.raises(dataclasses.FrozenInstanceError):
        setattr(block, dataclasses.fields(block)[0].name, None)
    d = block.to_dict()
    assert json.loads(json.dumps(d, allow_nan=False)) == d
    assert d == result.to_dict()[key]  # results.json holds the block as it is


@pytest.mark.parametrize("attribute", sorted(BLOCKS))
def test_block_to_dict_holds_only_declared_keys(result, attribute):
    block = getattr(result, attribute)
    keys = set(block.to_dict())
    assert keys <= _declared(block), keys - _declared(block)


def test_optional_keys_appear_exactly_when_set(small_result, binary_result):
    # continuous, adjusted statistic: the studentized companion, no sum test, no Breslow-Day
    cont, binary = small_result.to_dict(), binary_result.to_dict()
    assert "studentized" in cont["test"] and "sum_statistic" not in cont["test"]
    assert "sum_statistic" in binary["test"]
    assert "breslow_day" not in cont["heterogeneity"] and "breslow_day" in binary["heterogeneity"]
    assert "note" not in cont["heterogeneity"]
    assert binary_result.tests.sum_statistic.statistic_name == "sum"


def test_sensitivity_repeats_its_detail_fields(small_result):
    s = small_result.sensitivity
    d = s.to_dict()
    assert d["gamma_threshold"] == d["gamma_threshold_detail"]["gamma"] == s.gamma_threshold_detail.gamma
    assert d["gamma_curve"] == d["gamma_bounds"]["curve"]
    assert d["gamma_level"] == s.gamma_threshold_detail.alpha


def test_flow_counts_add_up_and_join_the_data_stage_counts(small_result, shift_data):
    flow = small_result.flow
    assert flow.rows_read == len(shift_data)
    assert flow.rows_analysed == small_result.n_used == sum(flow.analysed_by_group.values())
    used = small_result.arrays["t"]
    assert flow.analysed_by_group == {"exposed": int(used.sum()),
                                      "reference": int(len(used) - used.sum())}
    # the data stage's Flow no longer declares the later stages' counts
    from stratagap.data import Flow
    later = {"trimmed_by_group", "strata_set_aside_by_group", "analysed_by_group", "rows_analysed",
             "not_matched_by_group", "followup_by_step"}
    assert not later & {f.name for f in dataclasses.fields(Flow)}
    # the data stage's events and follow-up set aside for missing values enter the result only
    # inside ``followup_by_step`` (one of its steps), not as a field of their own
    data_stage = set(Flow.__dataclass_fields__) - {"followup_set_aside"}
    assert data_stage | later == {f.name for f in dataclasses.fields(flow)}


def test_prepared_summary_is_typed(small_result):
    p = small_result.prepared_summary
    assert isinstance(p, PreparedSummary) and p.n_used == small_result.n_used
    assert small_result.to_dict()["covariates"] == {"covariates": p.covariates,
                                                    "design_columns": p.design_columns,
                                                    "terms": p.covariate_terms}


def test_heterogeneity_undefined_with_one_usable_stratum():
    per = [{"estimate": 1.0, "se": 0.5}, {"estimate": 2.0, "se": None},
           {"estimate": 3.0, "se": float("nan")}]
    h = heterogeneity_across_strata(per, None, None, None, binary=True)
    assert h.cochran_q is None and "not defined" in h.note
    d = h.to_dict()
    assert list(d) == ["cochran_q", "note"] and json.loads(json.dumps(d)) == d


def test_heterogeneity_block_is_cochran_q_of_the_usable_rows():
    from stratagap.estimation.heterogeneity import cochran_q
    per = [{"estimate": 1.0, "se": 0.5}, {"estimate": 2.0, "se": 0.0}, {"estimate": 3.0, "se": 1.0}]
    h = heterogeneity_across_strata(per, None, None, None, binary=False)
    # the stratum with se = 0 has no usable weight and is left out
    assert h.cochran_q == cochran_q([1.0, 3.0], [0.5, 1.0]) and h.breslow_day is None
    assert list(h.to_dict()) == ["cochran_q"]
    # closed form (Cochran 1954): Q = sum w (e - pooled)^2, w = 1/se^2
    w = np.array([4.0, 1.0])
    e = np.array([1.0, 3.0])
    pooled = (w * e).sum() / w.sum()
    assert abs(h.cochran_q.statistic - (w * (e - pooled) ** 2).sum()) < 1e-12


def test_notebook_conveniences(tmp_path):
    """summary(), save(), figures, a short repr, a light _repr_html_, warnings raised."""
    import warnings as _w

    import matplotlib.figure
    import stratagap
    from stratagap.demo import make_shift_work_data
    from stratagap.errors import StratagapWarning
    from stratagap.render.summary import render_summary

    data = make_shift_work_data(n=800, seed=4).drop(columns=["_true_effect"])
    data.loc[:30, "bmi"] = float("nan")
    with _w.catch_warnings(record=True) as caught:
        _w.simplefilter("always")
        res = stratagap.analyze(data, exposure="shift", exposed_value="nights",
                                outcome="systolic_bp", covariates=["age", "bmi", "role"],
                                missing="indicator", resamples=199, seed=1)
    raised = {(w.category.__name__, str(w.message)) for w in caught
              if issubclass(w.category, StratagapWarning)}
    recorded = {(w["kind"], w["message"]) for w in res.to_dict()["warnings"]}
    assert recorded and recorded == raised
    assert res.summary() == render_summary(res.to_dict())
    written = res.save(tmp_path / "out")
    assert {p.name for p in written} >= {"results.json", "run.json", "balance.csv", "strata.csv",
                                         "report.html"}
    assert (tmp_path / "out" / "results.json").read_text() == res.to_json()
    figs = res.figures
    assert set(figs) >= {"balance", "gamma_curve", "overlap"}
    assert all(isinstance(f, matplotlib.figure.Figure) for f in figs.values())
    text = repr(res)
    assert text.startswith("<AnalysisResult systolic_bp by shift:") and len(text) < 200
    page = res._repr_html_()
    assert res.to_dict()["verdict"][:40] in page.replace("&#x27;", "'")
    assert page.count("<img") == 2 and len(page) < 150_000
