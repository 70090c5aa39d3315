"""On-demand mutation check: every listed source mutation must make the suite fail.

    python tests/mutation/run_mutations.py            # every mutation
    python tests/mutation/run_mutations.py --only drop_adjustment,halve_variance
    python tests/mutation/run_mutations.py --list

For each mutation the repository (src/, tests/, docs/, pyproject.toml and the top-level files)
is copied to a temporary folder, one exact piece of source text is replaced (it must occur
exactly once, so a refactoring that moves it makes the script say so instead of passing), and
the named test files run against the copy (``PYTHONPATH=<copy>/src``, ``-x``). A mutation is
*caught* when pytest reports failed tests (exit code 1); a collection or usage error (other
codes) is reported as an error, not as caught. The unmutated copy runs first and must pass.

Not a test module (no ``test_`` prefix): pytest does not collect it and CI does not run it.
Add a mutation whenever a real bug is found (docs/validation.md keeps the list and the result).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
COPY = ("src", "tests", "docs", "examples", "pyproject.toml", "README.md", "DEVELOPERS.md")
DEFAULTS = "tests/test_defaults.py"
VERDICT = "tests/render/test_verdict.py"


@dataclass(frozen=True)
class Mutation:
    name: str
    what: str
    path: str
    old: str
    new: str
    tests: tuple


MUTATIONS = [
    Mutation("survival_no_joint_model", "a stratum-group without the events for its own or its "
             "stratum's Cox model falls back to Kaplan-Meier instead of the model over all strata",
             "src/stratagap/estimation/survival/risk_difference.py",
             'joint["joint"] = _joint_model(time, event, t, X, codes, S, horizon, starts)',
             'joint["joint"] = None', ("tests/estimation/test_survival_estimates.py",)),
    Mutation("rate_mh_variance_numerator", "Var(ln RR_MH) numerator uses a_s instead of a_s + b_s",
             "src/stratagap/estimation/rates/_tables.py",
             "num = float(np.sum((a + b) * pt1 * pt0 / pt ** 2))",
             "num = float(np.sum(a * pt1 * pt0 / pt ** 2))", ("tests/estimation/test_rates.py",)),
    Mutation("rate_headline_equal_strata", "the rate headline weights strata equally, not by person-time",
             "src/stratagap/estimation/rates/standardized.py",
             "v = np.asarray(pt_target) / np.sum(pt_target)",
             "v = np.ones(len(pt_target)) / len(pt_target)", ("tests/estimation/test_rates.py",)),
    Mutation("rate_headline_no_averaging_term", "the rate headline's variance omits the averaging term",
             "src/stratagap/estimation/rates/standardized.py",
             "var = v1 + v0 + v_avg", "var = v1 + v0", ("tests/estimation/test_rates.py",)),
    Mutation("rate_scores_no_offset", "the rate test's Poisson model drops the person-time offset",
             "src/stratagap/inference/rate_scores.py",
             "logpt = np.log(pt)", "logpt = np.zeros_like(pt)",
             ("tests/inference/test_rate_scores.py",)),
    Mutation("rate_test_on_raw_counts", "the rate test shuffles the raw counts, not events minus expected",
             "src/stratagap/_rate_wiring.py",
             "tests = _tests(spec, scores.values, t, labels, ctx.layout, ctx.progress)",
             "tests = _tests(spec, y, t, labels, ctx.layout, ctx.progress)",
             ("tests/test_rate_pipeline.py",)),
    Mutation("drop_adjustment", "the test runs on the raw outcome instead of the residuals",
             "src/stratagap/pipeline.py",
             "values = _permutation.residualize(y, X, labels)  # Rosenbaum",
             "values = y  # Rosenbaum", (DEFAULTS,)),
    Mutation("swap_estimand_weights", "ATE weights n1_s/n1 and ATT weights n_s/n",
             "src/stratagap/_base/layout.py",
             "            weights = n / n.sum()  # ATE: stratum share of units",
             "            weights = n1 / n1.sum()  # ATE: stratum share of units", (DEFAULTS,)),
    Mutation("halve_variance", "the headline variance is halved",
             "src/stratagap/estimation/effects.py",
             "var = float(np.sum(w ** 2 * v_tau))  # independent strata",
             "var = 0.5 * float(np.sum(w ** 2 * v_tau))  # independent strata", (DEFAULTS,)),
    Mutation("alpha_half_ci", "the normal CI is built at level 1 - alpha/2 (97.5 % labelled 95 %)",
             "src/stratagap/estimation/effects.py",
             "    z = float(stats.norm.ppf(1 - alpha / 2))\n    return float(est - z * se)",
             "    z = float(stats.norm.ppf(1 - alpha / 4))\n    return float(est - z * se)",
             (DEFAULTS,)),
    Mutation("raw_outcome_to_bounds", "the Gamma bounds get the raw outcome, not the test's values",
             "src/stratagap/pipeline.py",
             'tests["values"], t, labels, X[:, :prepared.n_linear], y, terms,',
             "y, t, labels, X[:, :prepared.n_linear], y, terms,", (DEFAULTS,)),
    Mutation("reverse_alternative", "'greater' returns the lower tail and 'less' the upper",
             "src/stratagap/inference/permutation.py",
             '    if alternative == "greater":\n        return pg\n    if alternative == "less":\n'
             '        return pl',
             '    if alternative == "greater":\n        return pl\n    if alternative == "less":\n'
             '        return pg', (DEFAULTS,)),
    Mutation("ignore_strata", "every analysed unit is put in one stratum",
             "src/stratagap/pipeline.py",
             "labels = np.asarray(strata.labels)[in_stratum]",
             "labels = np.zeros_like(np.asarray(strata.labels)[in_stratum])", (DEFAULTS,)),
    Mutation("skip_att_trimming", "the ATT keeps reference units outside the exposed score range",
             "src/stratagap/stratify/overlap.py",
             'if rule == "auto" and estimand == "att":',
             'if False and rule == "auto" and estimand == "att":', (DEFAULTS,)),
    Mutation("mislabel_ratio", "the risk ratio is labelled odds ratio (and the reverse)",
             "src/stratagap/estimation/effects.py",
             'out_measure = "risk ratio" if measure == "rr" else "odds ratio"',
             'out_measure = "odds ratio" if measure == "rr" else "risk ratio"', (DEFAULTS, VERDICT)),
    Mutation("crude_off_the_ratio_scale", "a ratio headline gets a crude risk difference",
             "src/stratagap/pipeline.py",
             'measure=spec.measure if prepared.outcome_type == "binary" else "difference")',
             'measure="difference")', (VERDICT,)),
    Mutation("gamma_search_stops_at_separable",
             "the general-strata Gamma bound quotes the separable allocation without searching",
             "src/stratagap/sensitivity/_gamma_search.py",
             "    cuts, singles = _single_steps(tables, cuts, T)",
             "    cuts, singles = _separable(tables), 0", ("tests/sensitivity/test_gamma_search.py",)),
    Mutation("gamma_provable_end_at_kappa_zero",
             "the provable end is taken at kappa = 0 only (the old conservative form)",
             "src/stratagap/sensitivity/_gamma_search.py",
             "    z_best = max(z_best, -float(res.fun))",
             "    z_best = f(0.0)", ("tests/sensitivity/test_gamma_search.py",)),
    Mutation("threshold_when_not_significant",
             "the verdict quotes a Gamma threshold when the test is not significant at Gamma = 1",
             "src/stratagap/render/verdict.py",
             "    if flag == NOT_SIGNIFICANT or gamma is None:",
             "    if gamma is None:", (VERDICT,)),
    Mutation("att_centre_at_stratum_mean", "the ATT's covariates are centred at the stratum mean",
             "src/stratagap/estimation/_within_strata.py",
             'centre = X.mean(axis=0) if estimand == "ate" else X[t == 1].mean(axis=0)\n'
             '    keep, Z, notes',
             "centre = X.mean(axis=0)\n    keep, Z, notes", (DEFAULTS,)),
    Mutation("hc0_instead_of_hc2", "the within-stratum variance drops the HC2 leverage correction",
             "src/stratagap/_base/linalg.py",
             "u = e * e / (1.0 - h)", "u = e * e", (DEFAULTS,)),
    Mutation("no_shared_slopes", "a column one group cannot estimate is interacted anyway (the "
             "interacted fit fails and the stratum falls to main effects)",
             "src/stratagap/estimation/_within_strata.py",
             "        if ok:\n            candidates.append(j)",
             "        candidates.append(j)", ("tests/estimation/test_effects.py",)),
    Mutation("no_extrapolation_guard", "interactions kept however far a group's fit extrapolates",
             "src/stratagap/estimation/_within_strata.py",
             "EXTRAPOLATION_RATIO = 4.0", "EXTRAPOLATION_RATIO = float('inf')",
             ("tests/estimation/test_effects.py",)),
    Mutation("interactions_all_or_nothing", "when the full interacted set fails, the stratum "
             "goes straight to main effects instead of giving up interactions column by column",
             "src/stratagap/estimation/_within_strata.py",
             "for m in range(len(order), 0, -1):",
             "for m in range(len(order), len(order) - 1, -1):",
             ("tests/estimation/test_effects.py",)),
    Mutation("design_variance_by_inverse", "the extrapolation rule reads [(D'D)^-1]_tt from an "
             "explicit inverse (inaccurate, even negative, on nearly collinear designs)",
             "src/stratagap/estimation/_within_strata.py",
             "    return tuple(variances)",
             "    return tuple(float(np.linalg.inv(D[:, :k].T @ D[:, :k])[1, 1])\n"
             "                 for k in (D.shape[1], k_main))",
             ("tests/estimation/test_effects.py",)),
    Mutation("splines_all_or_nothing", "a spline design that no rung can fit sends the stratum "
             "to linear terms in every covariate instead of giving up spline columns one by one",
             "src/stratagap/estimation/_within_strata.py",
             "    for m in range(1, len(spline)):",
             "    for m in range(len(spline), len(spline)):",
             ("tests/estimation/test_effects.py",)),
]


def _copy_repo(dest: Path) -> None:
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc", ".pytest_cache")
    for name in COPY:
        src = ROOT / name
        if src.is_dir():
            shutil.copytree(src, dest / name, ignore=ignore)
        elif src.exists():
            shutil.copy2(src, dest / name)


def _pytest(copy: Path, tests) -> int:
    env = dict(os.environ, PYTHONPATH=str(copy / "src"), PYTHONDONTWRITEBYTECODE="1")
    # one process (-n 0): under pytest-xdist, -x stops the workers and pytest exits 2
    # ("interrupted"), which would read as an error instead of a caught mutation
    cmd = [sys.executable, "-m", "pytest", "-q", "-x", "-n", "0", "-p", "no:cacheprovider",
           *tests]
    done = subprocess.run(cmd, cwd=copy, env=env, stdout=subprocess.PIPE,
                          stderr=subprocess.STDOUT, text=True)
    return done.returncode


def run(mutations) -> int:
    tests = sorted({t for m in mutations for t in m.tests})
    with tempfile.TemporaryDirectory(prefix="stratagap-mutation-") as tmp:
        base = Path(tmp) / "base"
        _copy_repo(base)
        started = time.perf_counter()
        code = _pytest(base, tests)
        print(f"baseline (no mutation), {' '.join(tests)}: exit {code} "
              f"({time.perf_counter() - started:.0f} s)", flush=True)
        if code != 0:
            print("the unmutated suite must pass first")
            return 2
        print("| mutation | what | tests | result |\n|---|---|---|---|")
        survived = 0
        for m in mutations:
            copy = Path(tmp) / m.name
            _copy_repo(copy)
            target = copy / m.path
            text = target.read_text(encoding="utf-8")
            if text.count(m.old) != 1:
                print(f"| {m.name} | {m.what} | - | **source text not found once in {m.path}: "
                      f"update the mutation** |", flush=True)
                survived += 1
                continue
            target.write_text(text.replace(m.old, m.new), encoding="utf-8")
            started = time.perf_counter()
            code = _pytest(copy, m.tests)
            result = {0: "**SURVIVED**", 1: "caught"}.get(code, f"**error (exit {code})**")
            survived += code != 1
            names = ", ".join(Path(t).name for t in m.tests)
            print(f"| {m.name} | {m.what} | {names} | {result} "
                  f"({time.perf_counter() - started:.0f} s) |", flush=True)
            shutil.rmtree(copy)
    print(f"\n{len(mutations) - survived} of {len(mutations)} mutations caught")
    return 1 if survived else 0


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", default="", help="comma-separated mutation names")
    parser.add_argument("--list", action="store_true", help="list the mutations and exit")
    args = parser.parse_args(argv)
    chosen = [m for m in MUTATIONS if not args.only or m.name in args.only.split(",")]
    if args.list:
        for m in MUTATIONS:
            print(f"{m.name}: {m.what} ({m.path})")
        return 0
    if not chosen:
        parser.error("no mutation of that name; see --list")
    return run(chosen)


if __name__ == "__main__":
    sys.exit(main())
