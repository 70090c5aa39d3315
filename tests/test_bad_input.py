"""Bad input, file safety and reproducibility (issue 5, items 1-5).

Every ill-posed question must be refused with ONE line that names the column or argument and
says what to do (exit code 2 on the CLI, no traceback); where an issue defines a handled path
(separation -> penalized fit, constant covariate -> dropped) the result is produced and a named
warning is recorded on it. Inputs are never modified; outputs are written atomically; the same
inputs and seed give byte-identical ``results.json``, whatever the row order or thread count.

Most cases run in-process through :func:`stratagap.analyze` and :func:`stratagap.cli.main`; a
handful run as real subprocesses (``python -m stratagap.cli``).
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import stratagap
from stratagap import InputError
from stratagap.cli import main

RESAMPLES = 99  # enough to exercise every stage; the p-values are not what is tested here


# ----------------------------------------------------------------------------- helpers
def make_frame(n=300, seed=1) -> pd.DataFrame:
    """Invented clinic data: night vs day shift, confounded by age and role."""
    rng = np.random.default_rng(seed)
    age = rng.normal(40, 10, n).round(1)
    bmi = rng.normal(26, 4, n).round(1)
    role = rng.choice(["nurse", "porter", "admin"], n)
    lin = 0.08 * (age - 40) + np.where(role == "nurse", 0.5, 0.0)
    night = rng.random(n) < 1 / (1 + np.exp(-lin))
    y = 120 + 0.5 * (age - 40) + 0.8 * (bmi - 26) + 2.0 * night + rng.normal(0, 5, n)
    return pd.DataFrame({
        "person": [f"P{i:04d}" for i in range(n)],
        "grp": np.where(night, "night", "day"),
        "age": age, "bmi": bmi, "role": role,
        "y": y.round(2),
        "event": (y > 125).astype(int),
    })


BASE = dict(exposure="grp", exposed_value="night", outcome="y", covariates=["age", "bmi", "role"],
            resamples=RESAMPLES, seed=3)


def run(frame, **changes):
    kw = {**BASE, **changes}
    return stratagap.analyze(frame, **kw)


def warned(result, kind, *needles):
    """The recorded warnings of ``kind`` whose message contains every needle."""
    rows = result.to_dict()["warnings"]
    return [w for w in rows if w["kind"] == kind and all(n in w["message"] for n in needles)]


def input_error(frame, match, **changes) -> str:
    with pytest.raises(InputError, match=match) as info:
        run(frame, **changes)
    msg = str(info.value)
    assert "\n" not in msg, msg  # one line
    return msg


def write_csv(tmp_path, frame, name="data.csv") -> Path:
    path = tmp_path / name
    frame.to_csv(path, index=False)
    return path


def cli_args(path, *extra):
    return ["analyze", str(path), "--exposure", "grp", "--exposed-value", "night",
            "--outcome", "y", "--covariates", "age,bmi,role", "--resamples", str(RESAMPLES),
            "--quiet", *extra]


def cli_error(capsys, argv, *needles) -> str:
    """Run the CLI in-process; assert exit 2 and one clean line on stderr naming ``needles``."""
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.count("\n") == 1 and err.startswith("stratagap: error:"), err
    assert "Traceback" not in err
    for needle in needles:
        assert needle in err, err
    return err


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def frame():
    return make_frame()


@pytest.fixture()
def csv(tmp_path, frame):
    return write_csv(tmp_path, frame)


# ------------------------------------------------------------------ files and formats (CLI)
def test_missing_file(tmp_path, capsys):
    cli_error(capsys, cli_args(tmp_path / "nowhere.csv"), "nowhere.csv", "does not exist")


def test_empty_file(tmp_path, capsys):
    path = tmp_path / "empty.csv"
    path.write_bytes(b"")
    cli_error(capsys, cli_args(path), "empty.csv", "empty")


def test_blank_file(tmp_path, capsys):
    path = tmp_path / "blank.csv"
    path.write_text("\n\n   \n")
    cli_error(capsys, cli_args(path), "blank.csv")


def test_header_only(tmp_path, capsys):
    path = tmp_path / "header.csv"
    path.write_text("person,grp,age,bmi,role,y\n")
    cli_error(capsys, cli_args(path), "header.csv", "no data rows")


def test_directory_as_input(tmp_path, capsys):
    cli_error(capsys, cli_args(tmp_path), "directory")


def test_unknown_suffix(tmp_path, frame, capsys):
    path = write_csv(tmp_path, frame, "data.xlsx")
    cli_error(capsys, cli_args(path), "data.xlsx", ".xlsx")


def _latin1_csv(tmp_path, frame):
    # 'é' and 'ï' as single latin-1 bytes (0xe9, 0xef) are invalid UTF-8 sequences here.
    text = frame.assign(role=frame["role"].replace({"porter": "portéur", "admin": "naïve"}))
    path = tmp_path / "latin1.csv"
    path.write_bytes(text.to_csv(index=False).encode("latin-1"))
    with pytest.raises(UnicodeDecodeError):
        path.read_bytes().decode("utf-8")
    return path


def test_undecodable_encoding_is_a_clean_error(tmp_path, frame, capsys):
    path = _latin1_csv(tmp_path, frame)
    cli_error(capsys, cli_args(path), "latin1.csv", "UTF-8", "--encoding")


def test_the_advised_encoding_flag_reads_the_file(tmp_path, frame, capsys):
    # The error above advises --encoding; following the advice must work.
    path = _latin1_csv(tmp_path, frame)
    argv = [a for a in cli_args(path, "--encoding", "latin-1", "--format", "json")
            if a != "--quiet"]
    assert main(argv) == 0, capsys.readouterr().err
    levels = {row["level"] for row in json.loads(capsys.readouterr().out)["balance"]["rows"]}
    assert "portéur" in levels


def test_duplicate_column_names_in_file(tmp_path, capsys):
    path = tmp_path / "dup.csv"
    path.write_text("grp,age,age,y\nnight,1,2,3\nday,2,3,4\n")
    cli_error(capsys, cli_args(path), "duplicate", "age")


def test_duplicate_column_names_in_frame(frame):
    dup = frame.copy()
    dup.columns = ["person", "grp", "age", "age", "role", "y", "event"]
    input_error(dup, "duplicate.*age", covariates=["age", "role"])


def test_parquet_that_is_really_csv(tmp_path, frame, capsys):
    path = write_csv(tmp_path, frame, "data.parquet")
    cli_error(capsys, cli_args(path), "data.parquet", "CSV", ".csv")


def test_stata_file_that_is_really_csv(tmp_path, frame, capsys):
    path = write_csv(tmp_path, frame, "data.dta")
    cli_error(capsys, cli_args(path), "data.dta", "CSV")


def test_damaged_parquet(tmp_path, capsys):
    path = tmp_path / "broken.parquet"
    path.write_bytes(b"PAR1" + b"\x00\x01garbage" * 20)
    cli_error(capsys, cli_args(path), "broken.parquet", "Parquet")


# ------------------------------------------------------------------------ columns (API)
def test_column_not_in_table_suggests_close_match(frame):
    input_error(frame, r"outcome.*'yy'.*did you mean 'y'", outcome="yy")
    input_error(frame, r"covariates.*'bmii'.*did you mean 'bmi'", covariates=["age", "bmii"])
    input_error(frame, r"exposure.*'group'.*did you mean 'grp'", exposure="group")


def test_column_not_in_table_on_the_cli(csv, capsys):
    argv = cli_args(csv)
    argv[argv.index("age,bmi,role")] = "age,bmi,rol"
    cli_error(capsys, argv, "'rol'", "did you mean 'role'")


def test_exposure_with_one_value(frame):
    input_error(frame.assign(grp="night"), r"exposure.*'grp'.*1 value")


def test_exposure_with_three_values(frame):
    three = frame.assign(grp=np.where(frame.index % 3 == 0, "rotating", frame["grp"]))
    msg = input_error(three, r"exposure.*'grp'.*3 value")
    assert "rotating" in msg and "night" in msg and "day" in msg  # lists the values


def test_exposure_two_text_values_without_exposed_value(frame):
    input_error(frame, r"exposed_value=night|exposed_value=day", exposed_value=None)


def test_exposed_value_not_in_column(frame):
    input_error(frame, r"exposed_value.*'evening'.*not one of", exposed_value="evening")


def test_exposure_one_group_after_dropping_missing(frame):
    # every reference (day) row misses bmi: complete cases leave only the night group
    holes = frame.assign(bmi=frame["bmi"].where(frame["grp"] == "night"))
    input_error(holes, r"exposure.*'grp'.*only the exposed group")


def test_outcome_non_numeric(frame):
    text = frame.assign(y=np.where(frame.index % 3 == 0, "high", np.where(frame.index % 3 == 1,
                                                                           "low", "mid")))
    input_error(text, r"outcome.*'y'.*not numeric|outcome.*'y'.*3 values")


def test_outcome_constant(frame):
    input_error(frame.assign(y=5.0), r"outcome.*'y'.*constant")


def test_outcome_two_text_values_needs_event(frame):
    yes_no = frame.assign(y=np.where(frame["event"] == 1, "yes", "no"))
    input_error(yes_no, r"`outcome_event=no` or `outcome_event=yes`")


def test_outcome_with_inf(frame):
    bad = frame.assign(y=frame["y"].where(frame.index != 7, np.inf))
    input_error(bad, r"outcome.*'y'.*infinite")


def test_covariate_with_inf(frame):
    bad = frame.assign(bmi=frame["bmi"].where(frame.index != 3, -np.inf))
    input_error(bad, r"covariates.*'bmi'.*infinite")


def test_inf_in_csv_on_the_cli(tmp_path, frame, capsys):
    bad = frame.assign(age=frame["age"].astype(object).where(frame.index != 5, "inf"))
    path = write_csv(tmp_path, bad)
    cli_error(capsys, cli_args(path), "'age'", "infinite")


def test_outcome_dates_are_out_of_scope(frame):
    dated = frame.assign(y=pd.Timestamp("2024-01-01") + pd.to_timedelta(frame.index, unit="D"))
    input_error(dated, r"outcome.*'y'.*dates")


def test_time_to_event_outcome_is_flagged(frame):
    surv = frame.assign(days_to_event=np.abs(frame["y"] - 100), died=frame["event"])
    res = run(surv, outcome="days_to_event")
    assert warned(res, "DataWarning", "days_to_event", "time-to-event", "out of scope")


def test_covariate_constant_is_dropped_with_a_warning(frame):
    res = run(frame.assign(site="north"), covariates=["age", "bmi", "role", "site"])
    assert warned(res, "DataWarning", "'site'", "constant")
    d = res.to_dict()
    assert d["adjusted"]["estimate"] is not None and d["test"]["p_value"] is not None
    assert "site" not in d["covariates"]["covariates"]  # docs/results.md: the covariates used
    assert "age" in d["covariates"]["covariates"]


def test_all_covariates_constant(frame):
    input_error(frame.assign(a=1.0, b="x"), r"no covariates are left.*'a'", covariates=["a", "b"])


def test_covariate_identical_to_exposure(frame):
    same = frame.assign(night_flag=(frame["grp"] == "night").astype(int))
    input_error(same, r"covariates.*'night_flag'.*exposure", covariates=["age", "night_flag"])


def test_covariate_is_the_outcome(frame):
    input_error(frame, r"covariates.*'y'.*outcome", covariates=["age", "y"])


def test_id_like_text_covariate(frame):
    input_error(frame, r"covariates.*'person'.*identifier", covariates=["age", "person"])


def test_id_like_numeric_covariate_is_flagged(frame):
    # A numeric record number (one distinct, consecutive integer per row) passed by mistake:
    # a legal number, so not an error, but the DataWarning class exists for ID-like columns.
    numbered = frame.assign(record_no=np.arange(100001, 100001 + len(frame)))
    res = run(numbered, covariates=["age", "bmi", "role", "record_no"])
    assert warned(res, "DataWarning", "record_no")


def test_empty_covariate_list(frame):
    with pytest.raises(InputError, match="`covariates`"):
        run(frame, covariates=[])


def test_exposure_equals_outcome(frame):
    input_error(frame.assign(g01=(frame["grp"] == "night").astype(int)),
                r"exposure.*outcome.*same", exposure="g01", outcome="g01", exposed_value=None)


def test_bad_formula(frame):
    input_error(frame, r"formula", covariates=None, formula="age + + (")


def test_measure_ratio_needs_binary_outcome(frame):
    input_error(frame, r"measure=rr.*binary", measure="rr")


# ------------------------------------------------------ separation and overlap (API + CLI)
def test_quasi_separation_penalized_fit_with_named_covariate(frame):
    # Every 'porter' works nights: role separates part of the exposure, overlap remains
    # among the other roles -> SeparationWarning naming the covariate, and a result.
    sep = frame.copy()
    sep.loc[sep["role"] == "porter", "grp"] = "night"
    sep["porter"] = (sep["role"] == "porter").astype(int)
    res = run(sep, covariates=["age", "bmi", "porter"])
    hits = warned(res, "SeparationWarning", "porter")
    assert hits, res.to_dict()["warnings"]
    d = res.to_dict()
    assert d["propensity"]["penalized"] is True
    assert d["adjusted"]["estimate"] is not None and 0 < d["test"]["p_value"] <= 1


def _separated(frame):
    # Exposure determined by age: complete separation and no overlap at all.
    return frame.assign(grp=np.where(frame["age"] > frame["age"].median(), "night", "day"))


def test_complete_separation_without_overlap_is_a_user_error(frame):
    input_error(_separated(frame), r"overlap", covariates=["age", "bmi"])


def test_complete_separation_without_overlap_exits_2(tmp_path, frame, capsys):
    path = write_csv(tmp_path, _separated(frame))
    err = cli_error(capsys, cli_args(path), "overlap")
    assert "stratagap: internal error" not in err


def test_too_many_strata(frame):
    input_error(frame, r"n_strata=200.*at most", n_strata=200)


def test_strata_zero(frame):
    input_error(frame, r"n_strata", n_strata=0)


def test_one_stratum_is_allowed(frame):
    # `--strata 1` is a legal request (an unstratified, covariance-adjusted comparison);
    # secondary diagnostics that need two strata must step aside, not fail the analysis.
    d = run(frame, n_strata=1).to_dict()
    assert len(d["strata"]) == 1 and 0 < d["test"]["p_value"] <= 1


def test_binary_outcome_only_in_the_exposed_group(frame):
    # Every event among the exposed: the risk ratio is infinite, its E-value undefined. The
    # risk difference and the test are well defined, so a secondary measure must not abort the
    # analysis. Expected: a result (no error).
    only = frame.assign(ev=((frame["grp"] == "night") & (frame.index % 2 == 0)).astype(int))
    d = run(only, outcome="ev").to_dict()
    assert d["adjusted"]["estimate"] is not None and 0 < d["test"]["p_value"] <= 1


def test_binary_outcome_identical_to_the_exposure(frame):
    # The outcome is the exposure recoded (a common extract mistake): the risk ratio is
    # undefined. Expected: a one-line error naming `outcome` that says what is wrong.
    same = frame.assign(ev=(frame["grp"] == "night").astype(int))
    input_error(same, r"`outcome` column 'ev' is the exposure recoded", outcome="ev")


def test_user_strata_lacking_a_group_are_set_aside(frame):
    site = np.where(frame.index < 20, "solo", np.where(frame.index % 2, "A", "B"))
    solo = frame.assign(site=site)
    solo["grp"] = np.where(solo["site"] == "solo", "night", solo["grp"])
    res = run(solo, strata_column="site")
    assert warned(res, "StrataWarning")
    assert res.to_dict()["flow"]["strata_set_aside_by_group"]["exposed"] == 20


def test_exact_engine_with_too_many_assignments(frame):
    input_error(frame, r"engine.*exact.*monte_carlo", engine="exact")


def test_min_per_group_larger_than_a_group(frame):
    input_error(frame, r"min_per_group|--min-per-group", min_per_group=500)


def test_tiny_sample_gets_a_result(frame):
    # Expected: a result (4 + 4 units in one stratum are enough for the test), no error.
    tiny = frame.groupby("grp").head(4).reset_index(drop=True)  # 4 + 4 units
    d = run(tiny, covariates=["age"], n_strata=1).to_dict()
    assert d["n_used"] == 8 and 0 < d["test"]["p_value"] <= 1
    assert d["test"]["engine"] == "exact"  # 70 assignments <= resamples: enumerate them


# ----------------------------------------------------------------------- arguments (CLI)
@pytest.mark.parametrize("extra, needle", [
    (["--resamples", "0"], "--resamples"),
    (["--resamples", "-5"], "--resamples"),
    (["--resamples", "1000000000000"], "--resamples"),
    (["--resamples", "many"], "--resamples"),
    (["--resamples", "2.5"], "--resamples"),
    (["--estimand", "ato"], "--estimand"),
    (["--alternative", "bigger"], "--alternative"),
    (["--seed", "abc"], "--seed"),
    (["--seed", "1.5"], "--seed"),
    (["--seed", "-1"], "--seed"),
    (["--strata", "0"], "--strata"),
    (["--strata", "five"], "--strata"),
    (["--alpha", "0"], "--alpha"),
    (["--alpha", "1.5"], "--alpha"),
    (["--missing", "impute"], "--missing"),
    (["--engine", "gpu"], "--engine"),
    (["--trim", "some"], "--trim"),
    (["--format", "xml"], "--format"),
    (["--truncate-weights", "99,1"], "--truncate-weights"),
    (["--gamma-grid", "0.5,2"], "--gamma-grid"),
    (["--no-such-flag"], "unrecognized"),
])
def test_bad_argument(csv, capsys, extra, needle):
    cli_error(capsys, cli_args(csv, *extra), needle)


def test_missing_required_flags(csv, capsys):
    cli_error(capsys, ["analyze", str(csv), "--outcome", "y", "--covariates", "age"], "--exposure")


def test_strata_column_and_adaptive_exclude_each_other(csv, capsys):
    cli_error(capsys, cli_args(csv, "--strata-column", "role", "--strata-method", "adaptive"),
              "--strata-column")


def test_resamples_in_the_api(frame):
    for bad in (0, -1, 10**12, 2.5, "x", True):
        with pytest.raises(InputError, match="`resamples`"):
            run(frame, resamples=bad)


def test_seed_in_the_api(frame):
    for bad in ("abc", 1.5, -3, None, True):
        with pytest.raises(InputError, match="`seed`"):
            run(frame, seed=bad)


# --------------------------------------------------------------------------- missing data
def _holes(frame):
    out = frame.copy()
    out.loc[out.index % 10 == 0, "bmi"] = np.nan  # 30 rows
    out.loc[out.index % 25 == 1, "role"] = np.nan  # 12 rows
    return out


def test_missing_drop_counts_per_column_and_group(frame):
    holes = _holes(frame)
    res = run(holes)  # --missing drop is the default
    flow = res.to_dict()["flow"]
    assert flow["dropped_missing_by_column"]["bmi"] == 30
    assert flow["dropped_missing_by_column"]["role"] == 12
    dropped = holes["bmi"].isna() | holes["role"].isna()
    by_group = flow["dropped_missing_by_group"]
    assert by_group["exposed"] == int((dropped & (holes["grp"] == "night")).sum())
    assert by_group["reference"] == int((dropped & (holes["grp"] == "day")).sum())
    assert flow["rows_read"] == 300 and flow["rows_used"] == 300 - int(dropped.sum())


def test_missing_error_policy_names_the_columns(frame):
    msg = input_error(_holes(frame), r"missing=error.*'bmi'", missing="error")
    assert "'role'" in msg


def test_missing_indicator_warns_citing_groenwold(frame):
    res = run(_holes(frame), missing="indicator")
    assert warned(res, "MissingDataWarning", "bmi", "Groenwold")
    assert res.to_dict()["flow"]["rows_used"] == 300


def test_rows_missing_the_outcome_are_counted_by_group_and_flagged(frame):
    # 40 % of exposed outcomes missing vs none of the reference: complete cases may be biased
    skewed = frame.copy()
    night = np.flatnonzero(skewed["grp"] == "night")
    skewed.loc[night[: int(0.4 * len(night))], "y"] = np.nan
    res = run(skewed)
    miss = res.to_dict()["flow"]["missing_outcome_by_group"]
    assert miss["exposed"]["n"] == int(0.4 * len(night)) and miss["reference"]["n"] == 0
    assert warned(res, "MissingDataWarning", "outcome is missing")


def test_all_rows_missing_a_covariate(frame):
    input_error(frame.assign(bmi=np.nan), r"no rows are left.*'bmi'")


# --------------------------------------------------------------------------- file safety
def test_out_equal_to_the_input_file(csv, capsys):
    cli_error(capsys, cli_args(csv, "--out", str(csv)), "--out", "input")


def test_out_inside_the_input_path(csv, capsys):
    cli_error(capsys, cli_args(csv, "--out", str(csv / "results")), "--out")


def test_out_equal_to_the_spec_file(tmp_path, csv, capsys):
    spec = tmp_path / "study.toml"
    spec.write_text(f'data = "{csv}"\nexposure = "grp"\nexposed-value = "night"\noutcome = "y"\n'
                    'covariates = ["age", "bmi", "role"]\nresamples = 99\n')
    cli_error(capsys, ["analyze", "--spec", str(spec), "--out", str(spec), "--quiet"], "--out")


def test_overwrite_never_replaces_an_input_file(tmp_path, frame, capsys):
    out = tmp_path / "study"
    out.mkdir()
    path = write_csv(out, frame, "strata.csv")  # the input happens to carry an output's name
    before = sha256(path)
    code = main(cli_args(path, "--out", str(out), "--overwrite"))
    capsys.readouterr()
    assert sha256(path) == before
    assert code == 2


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """One CLI run with --out (and the report): the input files, their hashes, the folder."""
    base = tmp_path_factory.mktemp("written")
    path = write_csv(base, _holes(make_frame()))
    spec = base / "study.toml"
    spec.write_text('exposure = "grp"\nexposed-value = "night"\noutcome = "y"\n'
                    'covariates = ["age", "bmi", "role"]\nresamples = 99\n')
    before = (sha256(path), os.stat(path).st_mtime_ns, sha256(spec))
    out = base / "out"
    code = main(["analyze", str(path), "--spec", str(spec), "--missing", "indicator",
                 "--out", str(out), "--quiet"])
    failed = main(cli_args(path, "--covariates", "nope"))  # a failing run too
    return {"path": path, "spec": spec, "before": before, "out": out, "codes": (code, failed)}


def test_inputs_are_never_modified(written):
    assert written["codes"] == (0, 2)
    path, spec = written["path"], written["spec"]
    assert (sha256(path), os.stat(path).st_mtime_ns, sha256(spec)) == written["before"]


def test_outputs_are_atomic_no_temporary_files_left(written):
    out = written["out"]
    names = sorted(p.name for p in out.rglob("*"))
    assert "results.json" in names and "run.json" in names
    assert not [n for n in names if n.endswith(".tmp") or n.startswith(".results")], names
    json.loads((out / "results.json").read_text())  # complete, parseable


def test_recorded_command_is_the_one_given(written):
    # main(argv) must record argv, not the host process's sys.argv (pytest's, in-process);
    # it lives in run.json with the timings, so results.json does not depend on --out.
    command = json.loads((written["out"] / "run.json").read_text())["command"]
    assert command.startswith("stratagap analyze") and "--missing indicator" in command, command
    assert str(written["out"]) not in (written["out"] / "results.json").read_text()


def test_a_failed_write_leaves_neither_temporary_nor_partial_file(tmp_path, monkeypatch):
    from stratagap.render import files as output

    target = tmp_path / "results.json"
    target.write_text("old\n")

    def boom(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(output.os, "replace", boom)
    with pytest.raises(OSError):
        output.write_atomic(target, "new content\n")
    assert target.read_text() == "old\n"  # the previous file is intact
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results.json"]


def test_a_failed_analysis_leaves_no_files_in_out(csv, tmp_path, capsys):
    out = tmp_path / "out"
    cli_error(capsys, cli_args(csv, "--outcome", "nope", "--out", str(out)), "'nope'")
    assert not out.exists() or not any(out.iterdir())


# ------------------------------------------------------------------------- subprocesses
def _subprocess(argv, env=None):
    return subprocess.run([sys.executable, "-m", "stratagap.cli", *argv], capture_output=True,
                          text=True, env=env, timeout=300)


def _assert_clean_exit_2(proc, *needles):
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr, proc.stderr
    for needle in needles:
        assert needle in proc.stderr, proc.stderr


def test_subprocess_parquet_really_csv(tmp_path, frame):
    path = write_csv(tmp_path, frame, "data.parquet")
    _assert_clean_exit_2(_subprocess(cli_args(path)), "CSV")


def test_subprocess_three_group_exposure(tmp_path, frame):
    three = frame.assign(grp=np.where(frame.index % 3 == 0, "rotating", frame["grp"]))
    path = write_csv(tmp_path, three)
    _assert_clean_exit_2(_subprocess(cli_args(path)), "'grp'", "3 value")


def test_subprocess_seed_not_an_integer(csv):
    _assert_clean_exit_2(_subprocess(cli_args(csv, "--seed", "twelve")), "--seed")


def test_subprocess_no_overlap(tmp_path, frame):
    path = write_csv(tmp_path, _separated(frame))
    _assert_clean_exit_2(_subprocess(cli_args(path, "--covariates", "age,bmi")), "overlap")


# ----------------------------------------------------------------------- reproducibility
def _results_bytes(path, out, env=None, subprocess_run=False):
    """results.json of one run into the folder ``out`` (in-process or as a subprocess)."""
    argv = cli_args(path, "--resamples", str(RESAMPLES), "--seed", "11", "--out", str(out))
    if subprocess_run:
        proc = _subprocess(argv, env=env)
        assert proc.returncode == 0, proc.stderr
    else:
        assert main(argv) == 0
    return (out / "results.json").read_bytes()


def _strip_source(data: bytes) -> dict:
    # The source block names the input file and its hash; everything else must be identical.
    d = json.loads(data)
    d.pop("source", None)
    return d


def test_same_inputs_and_seed_give_byte_identical_results_json(written, tmp_path, capsys):
    # The same command as the `written` run, into another folder.
    again = tmp_path / "again"
    assert main(["analyze", str(written["path"]), "--spec", str(written["spec"]), "--missing",
                 "indicator", "--out", str(again), "--quiet"]) == 0
    assert (again / "results.json").read_bytes() == (written["out"] / "results.json").read_bytes()


def test_results_do_not_depend_on_row_order(tmp_path, frame, capsys):
    first = write_csv(tmp_path, frame, "rows.csv")
    shuffled_dir = tmp_path / "shuffled"
    shuffled_dir.mkdir()
    second = write_csv(shuffled_dir, frame.sample(frac=1.0, random_state=8), "rows.csv")
    assert sha256(first) != sha256(second)
    texts = []
    for path in (first, second):  # stdout JSON is the same text as results.json
        argv = [a for a in cli_args(path, "--seed", "11", "--format", "json") if a != "--quiet"]
        assert main(argv) == 0
        texts.append(capsys.readouterr().out)
    assert _strip_source(texts[0].encode()) == _strip_source(texts[1].encode())


def test_results_do_not_depend_on_thread_count(csv, tmp_path):
    envs = []
    for threads in ("1", "2"):
        env = dict(os.environ)
        for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
            env[var] = threads
        envs.append(env)
    a = _results_bytes(csv, tmp_path / "t1", env=envs[0], subprocess_run=True)
    b = _results_bytes(csv, tmp_path / "t2", env=envs[1], subprocess_run=True)
    assert a == b


# ------------------------------------------------------------------ many-level categoricals
def _many_levels(frame, n_levels=200, common=("A", "B", "C")):
    """A text covariate with a few common levels and very many rare ones."""
    rng = np.random.default_rng(5)
    n = len(frame)
    site = np.where(rng.random(n) < 0.6, rng.choice(list(common), n),
                    [f"site{k:03d}" for k in rng.integers(0, n_levels, n)])
    return frame.assign(site=site)


def test_categorical_with_too_many_levels_is_refused(frame):
    many = _many_levels(frame)
    k = many["site"].nunique()
    msg = input_error(many, r"`covariates` column 'site' has \d+ levels, more than",
                      covariates=["age", "bmi", "site"])
    assert f"has {k} levels" in msg and "`pool_rare_levels`" in msg


def test_pooling_rare_levels_keeps_the_common_ones(frame):
    many = _many_levels(frame)
    res = run(many, covariates=["age", "bmi", "site"], pool_rare_levels=True)
    assert warned(res, "DataWarning", "'site'", "pooled into one level")
    names = res.to_dict()["covariates"]["design_columns"]
    levels = {n.split(": ", 1)[1] for n in names if n.startswith("site: ")}
    counts = many["site"].value_counts()
    common = set(counts.index[counts >= 10])
    # every common level but the reference keeps its own column; no rare level does
    assert levels <= common | {"(rare levels pooled)"} and len(levels) >= len(common) - 1


def test_too_many_levels_on_the_command_line(tmp_path, capsys, frame):
    path = write_csv(tmp_path, _many_levels(frame))
    argv = ["analyze", str(path), "--exposure", "grp", "--exposed-value", "night", "--outcome",
            "y", "--covariates", "age,bmi,site", "--resamples", str(RESAMPLES), "--quiet"]
    cli_error(capsys, argv, "'site'", "`--pool-rare-levels`")
    assert main(argv + ["--pool-rare-levels"]) == 0
