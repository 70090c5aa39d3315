"""The CLI: exit codes, one-line errors, outputs, the demo."""

import json
import subprocess
import sys

import pytest

from stratagap.cli import main

ARGS = ["--exposure", "shift", "--exposed-value", "nights", "--outcome", "systolic_bp",
        "--covariates", "age,bmi,smoker,role", "--resamples", "200"]


def test_analyze_writes_outputs_and_summary(shift_csv, tmp_path, capsys):
    out = tmp_path / "out"
    assert main(["analyze", str(shift_csv), *ARGS, "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "adjusted" in printed and "Not medical advice" in printed
    for name in ("results.json", "balance.csv", "strata.csv", "run.json"):
        assert (out / name).is_file(), name
    data = json.loads((out / "results.json").read_text())
    assert data["test"]["resamples"] == 200
    header = (out / "balance.csv").read_text().splitlines()[0]
    assert header == ("covariate,level,smd_before,smd_after,var_ratio_before,var_ratio_after,"
                      "ks_before,ks_after,flagged")


def test_terms_flag_and_the_terms_line(shift_csv, capsys):
    assert main(["analyze", str(shift_csv), *ARGS]) == 0
    assert "terms: spline(age, 5 knots); spline(bmi, 5 knots)" in capsys.readouterr().out
    assert main(["analyze", str(shift_csv), *ARGS, "--terms", "linear", "--format", "json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert [t["label"] for t in data["covariates"]["terms"]] == ["linear(age)", "linear(bmi)"]
    assert data["spec"]["terms"] == "linear" and "age: spline 1" not in data["covariates"]["design_columns"]
    assert main(["analyze", str(shift_csv), *ARGS, "--terms", "cubic"]) == 2
    assert "`--terms` must be one of spline, linear" in capsys.readouterr().err


def test_analyze_refuses_non_empty_out_then_overwrites(shift_csv, tmp_path, capsys):
    out = tmp_path / "o"
    assert main(["analyze", str(shift_csv), *ARGS, "--out", str(out), "--quiet"]) == 0
    assert main(["analyze", str(shift_csv), *ARGS, "--out", str(out), "--quiet"]) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert main(["analyze", str(shift_csv), *ARGS, "--out", str(out), "--quiet",
                 "--overwrite"]) == 0


def test_json_format_and_quiet(shift_csv, capsys):
    assert main(["analyze", str(shift_csv), *ARGS, "--format", "json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert "adjusted" in data
    assert main(["analyze", str(shift_csv), *ARGS, "--quiet"]) == 0
    assert capsys.readouterr().out == ""


def test_spec_file_with_flag_override(shift_csv, tmp_path, capsys):
    toml = tmp_path / "study.toml"
    toml.write_text(f'data = "{shift_csv}"\nexposure = "shift"\nexposed-value = "nights"\n'
                    'outcome = "systolic_bp"\ncovariates = ["age", "bmi", "smoker", "role"]\n'
                    'resamples = 100\nstrata = 4\n')
    assert main(["analyze", "--spec", str(toml), "--strata", "3", "--format", "json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["spec"]["n_strata"] == 3 and data["test"]["resamples"] == 100


@pytest.mark.parametrize("extra, needle", [
    (["--estimand", "atx"], "--estimand"),
    (["--resamples", "0"], "--resamples"),
    (["--seed", "x"], "--seed"),
    (["--alternative", "up"], "--alternative"),
    (["--nonsense"], "unrecognized"),
])
def test_bad_arguments_exit_2_with_one_line(shift_csv, capsys, extra, needle):
    assert main(["analyze", str(shift_csv), *ARGS, *extra]) == 2
    err = capsys.readouterr().err
    assert needle in err and err.count("\n") == 1 and "Traceback" not in err


def test_demo_runs_twice_in_its_own_folder(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["demo", "--n", "800"]) == 0
    printed = capsys.readouterr().out
    assert "TRUE effect" in printed
    assert main(["demo", "--n", "800", "--quiet"]) == 0
    assert (tmp_path / "stratagap-demo" / "results.json").is_file()
    truth = json.loads((tmp_path / "stratagap-demo" / "truth.json").read_text())
    assert truth["n"] > 700


def test_demo_sick_leave_study_shows_an_adjusted_survival_curve(tmp_path, monkeypatch, capsys):
    """Issue 13's done-when: the demo runs the time-to-event study end to end."""
    monkeypatch.chdir(tmp_path)
    assert main(["demo", "--study", "sick-leave", "--n", "600"]) == 0
    printed = capsys.readouterr().out
    folder = tmp_path / "stratagap-demo-sick-leave"
    result = json.loads((folder / "results.json").read_text())
    truth = json.loads((folder / "truth.json").read_text())
    assert result["question"]["outcome_type"] == "time-to-event"
    assert truth["horizon"] == result["adjusted"]["horizon"] and 0 < truth["ate"] < 0.5
    assert "TRUE effect (invented data, ATE at time" in printed
    assert (folder / "figures" / "survival_curves.svg").is_file()
    assert "survival_curves" in (folder / "report.html").read_text()
    assert (folder / "sick_leave.csv").is_file() and not (folder / "shift_work.csv").exists()


def test_real_subprocess_bad_input_exit_code(tmp_path):
    missing = tmp_path / "nope.csv"
    proc = subprocess.run([sys.executable, "-m", "stratagap.cli", "analyze", str(missing), *ARGS],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "nope.csv" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_library_parameter_names_become_flags_on_the_command_line():
    from stratagap.cli import as_flags
    text = "`trim=common` would help; `n_strata` too; `covariates` is empty; `score` stays"
    assert as_flags(text) == ("`--trim common` would help; `--strata` too; `--covariates` is "
                              "empty; `score` stays")


def test_warnings_in_the_printed_summary_name_flags(tmp_path, capsys):
    import pandas as pd
    from stratagap.cli import main
    from stratagap.demo import make_shift_work_data
    data = make_shift_work_data(n=600, seed=3).drop(columns=["_true_effect"])
    data.loc[:40, "bmi"] = float("nan")
    path = tmp_path / "d.csv"
    data.to_csv(path, index=False)
    code = main(["analyze", str(path), "--exposure", "shift", "--exposed-value", "nights",
                 "--outcome", "systolic_bp", "--covariates", "age,bmi", "--missing", "indicator",
                 "--resamples", "200"])
    out = capsys.readouterr().out
    assert code == 0
    assert "`--missing indicator`" in out and "`missing=indicator`" not in out


def test_a_misspelt_flag_gets_a_suggestion(capsys):
    from stratagap.cli import main
    assert main(["analyze", "x.csv", "--exposed_value", "1"]) == 2
    err = capsys.readouterr().err
    assert "did you mean --exposed-value?" in err and err.count("\n") == 1


def test_a_flag_of_the_other_command_is_named_as_such(capsys):
    from stratagap.cli import main
    assert main(["demo", "--resamples", "499"]) == 2
    err = capsys.readouterr().err
    assert "--resamples is an option of `stratagap analyze`" in err and "did you mean" not in err


def test_one_stratum_is_said_to_be_no_subclassification():
    import warnings
    import numpy as np
    from stratagap.errors import StrataWarning
    from stratagap.stratify.strata import make_strata
    rng = np.random.default_rng(0)
    score = rng.random(200)
    t = (rng.random(200) < score).astype(np.int8)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        make_strata(score, t, estimand="ate", n_strata=1)
    assert any(issubclass(w.category, StrataWarning) and "no subclassification" in str(w.message)
               for w in caught)


def test_help_shows_the_options_in_groups(capsys):
    from stratagap.cli import main
    import pytest as _pytest
    with _pytest.raises(SystemExit):
        main(["analyze", "--help"])
    out = capsys.readouterr().out
    positions = [out.index(f"\n{name}:\n") for name in ("data", "design", "test", "sensitivity",
                                                         "output")]
    assert positions == sorted(positions)
    assert out.index("\n  --gamma-grid") > positions[3] and out.index("\n  --resamples") > positions[2]
    assert "1 or true is exposed" in " ".join(out.split())
