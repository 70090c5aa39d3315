"""Command line: ``stratagap analyze`` and ``stratagap demo``.

A thin layer: it parses arguments into an :class:`~stratagap.spec.AnalysisSpec` (a TOML file
given with ``--spec`` first, command-line flags over it), calls :func:`stratagap.analyze`, and
renders the result. Exit codes: 0 ok, 2 bad input or arguments (one line on stderr, no
traceback), 1 internal error.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import re
import shlex
import sys
import traceback
from pathlib import Path

from .errors import InputError

__all__ = ["main"]

DEMO_FOLDER = "stratagap-demo"
#: The demo's two invented studies of the same staff: default output folder of each.
DEMO_STUDIES = {"blood-pressure": DEMO_FOLDER, "sick-leave": "stratagap-demo-sick-leave"}


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit code 2, through the same path as other errors
        hint = _flag_hint(message)
        raise InputError(f"{message}{hint}; see `stratagap {self.prog.split()[-1]} --help`"
                         if " " in self.prog else f"{message}{hint}; see `stratagap --help`")


def _flag_hint(message: str) -> str:
    """' (did you mean --exposed-value?)' for an unknown flag close to a known one."""
    import difflib

    match = re.search(r"unrecognized arguments: (--?[\w-]+)", message)
    if not match:
        return ""
    given = match.group(1)
    flags = sorted(set(_FLAG_OF.values()) | {"--format", "--quiet", "--n", "--seed"})
    close = difflib.get_close_matches(given.replace("_", "-"), flags, n=1, cutoff=0.75)
    if close and close[0] == given:  # a real flag, of the other command
        command = "analyze" if given in _FLAG_OF.values() else "demo"
        return f" ({given} is an option of `stratagap {command}`)"
    return f" (did you mean {close[0]}?)" if close else ""


# (flag, spec field, type, help). Defaults live in AnalysisSpec only, so there is one source.
_OPTIONS = [
    ("--exposure", "exposure", str, "column holding the two groups"),
    ("--outcome", "outcome", str, "outcome column (binary or numeric; with --time the event "
     "indicator, with --person-time the event count)"),
    ("--time", "time", str, "follow-up time column (> 0): the outcome is then the time to an "
     "event, --outcome its 0/1 event indicator (0 = censored)"),
    ("--horizon", "horizon", str, "--time: follow-up time at which the risk difference is read "
     "(default: the last time with enough people at risk in every stratum and group)"),
    ("--person-time", "person_time", str, "person-time column (> 0): the outcome is then a rate, "
     "--outcome the count of events per person"),
    ("--covariates", "covariates", str, "comma-separated measured confounders"),
    ("--formula", "formula", str, "score-model right-hand side in Wilkinson notation, e.g. "
     "'age + I(age**2) + C(role)'; used for balance checks too"),
    ("--terms", "terms", str, "continuous covariates as spline (default, natural cubic "
     "splines) or linear terms; --formula overrides"),
    ("--exposed-value", "exposed_value", str, "value of --exposure that marks the exposed group "
     "(not needed for 0/1 or true/false, where 1 or true is exposed)"),
    ("--outcome-type", "outcome_type", str, "auto (default), binary or continuous"),
    ("--outcome-event", "outcome_event", str, "value of a two-valued outcome counted as the event"),
    ("--estimand", "estimand", str, "ate (default) or att"),
    ("--strata", "n_strata", int, "number of propensity-score strata (default 5)"),
    ("--strata-method", "strata_method", str, "quantile (default) or adaptive"),
    ("--strata-column", "strata_column", str, "use this column's groups (e.g. matched sets) as strata"),
    ("--design", "design", str, "strata (default: score strata) or match (matched sets built on the score)"),
    ("--per-exposed", "per_exposed", str, "--design match: reference units per exposed unit (default 1)"),
    ("--caliper-sd", "caliper_sd", str, "--design match: caliper in pooled SDs of the score's logit (default 0.2)"),
    ("--same-value-on", "same_value_on", str, "--design match: comma-separated columns matched units must share"),
    ("--min-per-group", "min_per_group", int, "merge adjacent strata with fewer units of a group (default 3)"),
    ("--trim", "trim", str, "overlap rule: auto (default, follows the estimand), none, common, crump"),
    ("--score-model", "score_model", str, "logistic (default) or boosting (cross-fitted)"),
    ("--folds", "folds", int, "cross-fitting folds for --score-model boosting (default 5)"),
    ("--statistic", "statistic", str, "adjusted (default), difference, studentized or sum"),
    ("--alternative", "alternative", str, "two-sided (default), greater or less"),
    ("--engine", "engine", str, "auto (default), monte_carlo, exact or normal"),
    ("--resamples", "resamples", str, "permutation resamples (default 10000)"),
    ("--seed", "seed", str, "random seed (default 2026)"),
    ("--alpha", "alpha", str, "significance level (default 0.05)"),
    ("--measure", "measure", str, "binary outcomes: difference (default), rr or or"),
    ("--gamma-grid", "gamma_grid", str, "comma-separated Γ values for the sensitivity curve"),
    ("--missing", "missing", str, "drop (default), error or indicator"),
    ("--negative-control", "negative_control", str, "an outcome the exposure cannot affect"),
    ("--truncate-weights", "truncate_weights", str, "truncate IP weights at percentiles LO,HI"),
    ("--batch-size", "batch_size", str, "resamples per batch (memory); results do not depend on it"),
    ("--cluster", "cluster", str, "column of the unit that was assigned (hospital, clinic, region)"),
    ("--cluster-level", "cluster_level", str, "auto (default), cluster (exposure per cluster) or unit"),
]


# Library messages name parameters (`covariates`, `trim=common`); the command line names flags.
_FLAG_OF = {dest: flag for flag, dest, _typ, _text in _OPTIONS} | {
    "censoring_weights": "--censoring-weights", "pool_rare_levels": "--pool-rare-levels",
    "encoding": "--encoding", "out": "--out",
    "overwrite": "--overwrite", "spec": "--spec"}


def as_flags(text: str) -> str:
    """Spell the parameters quoted in a library message as the flags that set them."""
    def flag(match):
        name, value = match.group(1), match.group(2)
        if name not in _FLAG_OF:
            return match.group(0)
        return f"`{_FLAG_OF[name]}`" if value is None else f"`{_FLAG_OF[name]} {value}`"
    return re.sub(r"`([a-z_]+)(?:=([^`]*))?`", flag, text)


#: --help shows the options in these groups, in this order.
_GROUP_TITLES = {
    "data": ("exposure", "outcome", "time", "horizon", "person_time", "covariates", "formula", "terms", "exposed_value",
             "outcome_type", "outcome_event", "missing", "negative_control", "cluster",
             "cluster_level"),
    "design": ("estimand", "n_strata", "strata_method", "strata_column", "design", "per_exposed",
               "caliper_sd", "same_value_on", "min_per_group", "trim", "score_model", "folds",
               "truncate_weights"),
    "test": ("statistic", "alternative", "engine", "resamples", "seed", "alpha", "measure",
             "batch_size"),
    "sensitivity": ("gamma_grid",),
    "output": (),
}


def _build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="stratagap", description=(
        "Does the gap between two non-randomized groups survive adjustment for measured "
        "confounders? Observational evidence only; not medical advice."))
    sub = parser.add_subparsers(dest="command", parser_class=_Parser)
    analyze = sub.add_parser("analyze", help="analyse a data file")
    analyze.add_argument("data", nargs="?", help="CSV, Parquet, Stata (.dta), SAS (.xpt), SPSS "
                         "(.sav) or Excel (.xlsx) file")
    groups = {name: analyze.add_argument_group(name) for name in _GROUP_TITLES}
    groups["data"].add_argument("--spec", help="TOML analysis file; flags given here override it")
    groups["data"].add_argument("--encoding", help="text encoding of a CSV file (default: UTF-8)")
    for flag, dest, typ, text in _OPTIONS:
        group = next(g for g, members in _GROUP_TITLES.items() if dest in members)
        groups[group].add_argument(flag, dest=dest, type=str, default=None, help=text)
    analyze = groups["data"]  # the two switches below belong with the data options
    analyze.add_argument("--censoring-weights", dest="censoring_weights", action="store_const",
                         const=True, default=None,
                         help="weight complete cases by inverse probability of an observed outcome")
    analyze.add_argument("--pool-rare-levels", dest="pool_rare_levels", action="store_const",
                         const=True, default=None,
                         help="pool levels of a categorical covariate with fewer than 10 rows "
                              "into one level (needed when a covariate has very many levels)")
    _add_output_options(groups["output"])
    demo = sub.add_parser("demo", help="simulate the invented shift-work study and analyse it")
    demo.add_argument("--seed", default="2026", help="seed of the simulated data and the analysis")
    demo.add_argument("--n", default="3000", help="number of simulated staff (default 3000)")
    demo.add_argument("--study", default="blood-pressure", choices=tuple(DEMO_STUDIES),
                      help="blood-pressure (default: systolic pressure, a continuous outcome) or "
                           "sick-leave (days to a first sick-leave spell, a time-to-event outcome)")
    _add_output_options(demo, default_out=None)
    return parser


def _add_output_options(p, default_out=None):
    p.add_argument("--out", default=default_out, help="folder for results.json, CSV tables and the report")
    p.add_argument("--overwrite", action="store_true", help="replace files in a non-empty --out folder")
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")
    p.add_argument("--format", default="text", choices=None, help="stdout format: text (default) or json")


def _progress(quiet: bool):
    if quiet or not sys.stderr.isatty():
        return None, None
    from tqdm import tqdm
    bar = tqdm(total=0, desc="resampling", unit="resample", file=sys.stderr, leave=False)

    def update(done, total):
        if bar.total != total:
            bar.reset(total=total)
        bar.n = done
        bar.refresh()
    return update, bar


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _spec_options(args) -> dict:
    from .spec import load_spec_file
    options = load_spec_file(args.spec) if args.spec else {}
    for _flag, dest, _typ, _text in _OPTIONS:
        value = getattr(args, dest)
        if value is not None:
            options[dest] = value
    if args.censoring_weights:
        options["censoring_weights"] = True
    if args.pool_rare_levels:
        options["pool_rare_levels"] = True
    if args.data:
        options["data_path"] = args.data
    for flag, dest in (("--exposure", "exposure"), ("--outcome", "outcome")):
        if not options.get(dest):
            raise InputError(f"`{flag}` is required (on the command line or in the --spec file)")
    if not options.get("data_path"):
        raise InputError("no data file given: pass DATA (a CSV, Parquet, .dta or .xpt file) or `data` in --spec")
    return options


def _warnings_in_summary_only():
    """The analysis's warnings are printed in the summary; Python's own display is silenced."""
    import contextlib
    import warnings

    from .errors import StratagapWarning

    @contextlib.contextmanager
    def quiet():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", StratagapWarning)
            yield
    return quiet()


def _check_format(fmt):
    if fmt not in ("text", "json"):
        raise InputError(f"`--format` must be text or json; got {fmt!r}")


def _run_analyze(args) -> int:
    from .data import read_table
    from .render.files import prepare_folder, write_result
    from .pipeline import analyze

    _check_format(args.format)
    options = _spec_options(args)
    path = Path(options.pop("data_path"))
    folder = prepare_folder(args.out, inputs=[path, args.spec], overwrite=args.overwrite) \
        if args.out else None
    table = read_table(path, encoding=args.encoding)
    progress, bar = _progress(args.quiet)
    source = {"file": path.name, "sha256": _sha256(path), "rows": int(len(table))}
    try:
        with _warnings_in_summary_only():
            result = analyze(table, progress=progress, source=source,
                             command=args.command_line, exposure=options.pop("exposure"),
                             outcome=options.pop("outcome"),
                             covariates=options.pop("covariates", None), data_path=str(path),
                             **options)
    finally:
        if bar is not None:
            bar.close()
    if folder is not None:
        write_result(result, folder)
    _print(result, args)
    return 0


def _run_demo(args) -> int:
    from .render.files import prepare_folder, write_atomic, write_result
    from .spec import AnalysisSpec

    _check_format(args.format)
    seed = AnalysisSpec(exposure="x", outcome="y", covariates="z", seed=args.seed).seed
    try:
        n = int(args.n)
    except ValueError:
        raise InputError(f"`--n` must be a whole number from 200 to 1,000,000; got {args.n!r}") from None
    if not 200 <= n <= 1_000_000:
        raise InputError(f"`--n` must be a whole number from 200 to 1,000,000; got {n:,}")
    folder = prepare_folder(args.out or DEMO_STUDIES[args.study], overwrite=args.overwrite,
                            demo=True)
    study = _demo_sick_leave if args.study == "sick-leave" else _demo_blood_pressure
    progress, bar = _progress(args.quiet)
    try:
        with _warnings_in_summary_only():
            result, truth = study(n, seed, folder, progress, args.command_line)
    finally:
        if bar is not None:
            bar.close()
    write_result(result, folder)
    write_atomic(folder / "truth.json", __import__("json").dumps(truth, indent=2) + "\n")
    _print(result, args, truth=truth)
    if not args.quiet and args.format == "text":
        print(f"Files written to {folder}")
    return 0


def _write_demo_data(public, folder, name):
    """Write the simulated table beside the results; return its source record."""
    from .render.files import write_atomic
    csv_path = folder / name
    write_atomic(csv_path, public.to_csv(index=False))
    return {"file": csv_path.name, "sha256": _sha256(csv_path), "rows": int(len(public)),
            "invented": True}


def _analysed_ids(result, public):
    return public["staff_id"].to_numpy()[result.arrays["row_ids"][result.arrays["used"]]]


def _demo_blood_pressure(n, seed, folder, progress, command):
    from .demo import DEMO_COVARIATES, make_shift_work_data, true_effects
    from .pipeline import analyze

    data = make_shift_work_data(n=n, seed=seed)
    public = data.drop(columns=["_true_effect"])
    source = _write_demo_data(public, folder, "shift_work.csv")
    result = analyze(public, exposure="shift", exposed_value="nights", outcome="systolic_bp",
                     covariates=list(DEMO_COVARIATES), negative_control="hearing_db", seed=seed,
                     progress=progress, source=source, command=command)
    return result, true_effects(data, _analysed_ids(result, public))


def _demo_sick_leave(n, seed, folder, progress, command):
    """Days to a first sick-leave spell: the headline is a risk difference at a horizon."""
    from .demo import DEMO_COVARIATES, make_sick_leave_data, true_risk_difference
    from .pipeline import analyze

    data = make_sick_leave_data(n=n, seed=seed)
    public = data.drop(columns=["_true_effect", "_hazard_days", "_hazard_nights"])
    source = _write_demo_data(public, folder, "sick_leave.csv")
    result = analyze(public, exposure="shift", exposed_value="nights", outcome="sick_leave",
                     time="days_followed", covariates=list(DEMO_COVARIATES), seed=seed,
                     progress=progress, source=source, command=command)
    horizon = result.to_dict()["adjusted"]["horizon"]
    return result, true_risk_difference(data, _analysed_ids(result, public), horizon)


def _print(result, args, truth=None):
    from .render.summary import render_summary
    if args.quiet:
        return
    if args.format == "json":
        sys.stdout.write(result.to_json())
    else:
        sys.stdout.write(as_flags(render_summary(result.to_dict(), truth=truth)))


def main(argv=None) -> int:
    """Entry point; returns the exit code."""
    parser = _build_parser()
    argv = sys.argv[1:] if argv is None else [str(a) for a in argv]
    try:
        args = parser.parse_args(argv)
        args.command_line = "stratagap " + " ".join(shlex.quote(a) for a in argv)
        if args.command is None:
            parser.print_help()
            return 2
        if args.command == "analyze":
            return _run_analyze(args)
        return _run_demo(args)
    except InputError as exc:
        message = as_flags(" ".join(str(exc).split()))
        print(f"stratagap: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("stratagap: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal error: say so in one line; details on request
        if os.environ.get("STRATAGAP_DEBUG"):
            traceback.print_exc()
        print(f"stratagap: internal error: {type(exc).__name__}: {' '.join(str(exc).split())} "
              "(set STRATAGAP_DEBUG=1 for details; please report it)", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
