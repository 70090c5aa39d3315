"""Shared fixtures: the invented shift-work data (stratagap.demo) and a small analysis of it."""

import pytest

from stratagap.demo import DEMO_COVARIATES, make_shift_work_data

COVARIATES = list(DEMO_COVARIATES)


@pytest.fixture(scope="session")
def shift_data():
    return make_shift_work_data(n=1200, seed=11).drop(columns=["_true_effect"])


@pytest.fixture(scope="session")
def shift_csv(tmp_path_factory, shift_data):
    path = tmp_path_factory.mktemp("data") / "staff.csv"
    shift_data.to_csv(path, index=False)
    return path


@pytest.fixture(scope="session")
def small_result(shift_data):
    import stratagap
    return stratagap.analyze(shift_data, exposure="shift", exposed_value="nights",
                             outcome="systolic_bp", covariates=COVARIATES, resamples=999,
                             seed=5, negative_control="hearing_db")
