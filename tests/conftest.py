"""Shared fixtures: the invented shift-work data (stratagap.demo) and a small analysis of it."""

import os

# One BLAS thread per process. Why: pytest-xdist runs one worker per core (2 in CI), and a BLAS
# pool of 2 threads in each worker oversubscribes the cores (seen: CI at 45 min, 11 min with
# this setting). Set before numpy loads its BLAS; the workers and the CLI subprocesses inherit it.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import pytest  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

threadpool_limits(1)  # numpy may be loaded already (by a plugin): limit its pool as well

from stratagap.demo import DEMO_COVARIATES, make_shift_work_data  # noqa: E402

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
