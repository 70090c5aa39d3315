"""AnalysisSpec: argument checks and the TOML analysis file."""

import pytest

from stratagap import InputError
from stratagap.spec import AnalysisSpec, load_spec_file


def spec(**kw):
    base = dict(exposure="shift", outcome="bp", covariates="age,bmi")
    base.update(kw)
    return AnalysisSpec(**base)


def test_defaults_and_comma_separated_covariates():
    s = spec()
    assert s.covariates == ("age", "bmi")
    assert (s.estimand, s.n_strata, s.resamples, s.alternative, s.statistic) == (
        "ate", 5, 10_000, "two-sided", "adjusted")
    assert s.terms == "spline"  # issue 11: flexible terms by default


@pytest.mark.parametrize("kw, match", [
    ({"estimand": "atc"}, "`estimand`"),
    ({"alternative": "both"}, "`alternative`"),
    ({"resamples": 0}, "`resamples`"),
    ({"resamples": -5}, "`resamples`"),
    ({"resamples": 10**9}, "`resamples`"),
    ({"resamples": "many"}, "`resamples`"),
    ({"seed": "abc"}, "`seed`"),
    ({"seed": 1.5}, "`seed`"),
    ({"seed": -1}, "`seed`"),
    ({"alpha": 0}, "`alpha`"),
    ({"alpha": 0.9}, "`alpha`"),
    ({"gamma_grid": "0.5,2"}, "`gamma_grid`"),
    ({"gamma_grid": "a,b"}, "`gamma_grid`"),
    ({"n_strata": 0}, "`n_strata`"),
    ({"truncate_weights": "99,1"}, "`truncate_weights`"),
    ({"covariates": ""}, "`covariates`"),
    ({"engine": "gpu"}, "`engine`"),
    ({"terms": "cubic"}, "`terms`"),
    ({"measure": "rr", "outcome_type": "continuous"}, "`measure=rr`"),
])
def test_absurd_arguments_name_the_option(kw, match):
    with pytest.raises(InputError, match=match):
        spec(**kw)


def test_numeric_strings_from_the_command_line_are_accepted():
    s = spec(resamples="2000", seed="7", alpha="0.1", gamma_grid="2,1,1.5")
    assert (s.resamples, s.seed, s.alpha, s.gamma_grid) == (2000, 7, 0.1, (1.0, 1.5, 2.0))


def test_toml_file_round_trip(tmp_path):
    f = tmp_path / "study.toml"
    f.write_text('[analysis]\ndata = "staff.csv"\nexposure = "shift"\noutcome = "bp"\n'
                 'covariates = ["age", "bmi"]\nstrata = 8\nexposed-value = "nights"\n')
    got = load_spec_file(f)
    assert got["n_strata"] == 8 and got["exposed_value"] == "nights"
    assert got["data_path"] == str((tmp_path / "staff.csv").resolve())
    assert spec(**{k: v for k, v in got.items() if k not in ("data_path",)}).n_strata == 8


def test_toml_unknown_key_suggests(tmp_path):
    f = tmp_path / "study.toml"
    f.write_text('exposure = "a"\noutcome = "b"\nstrta = 4\n')
    with pytest.raises(InputError, match="strata"):
        load_spec_file(f)


def test_toml_invalid(tmp_path):
    f = tmp_path / "bad.toml"
    f.write_text("exposure = \n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_spec_file(f)
