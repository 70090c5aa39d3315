"""Benchmarks of the stratified permutation engine and of a whole analysis, measured in one run.

    python tests/benchmarks/run_benchmarks.py                          # full (about 5-10 min)
    python tests/benchmarks/run_benchmarks.py --write docs/performance.md
    python tests/benchmarks/run_benchmarks.py --quick                  # smoke size (seconds)

Prints, all measured in the same run on the same data:

* our engine (Monte Carlo, B resamples) for n = 10k, 100k, 1M rows, 5 and 50 strata, a
  continuous outcome (``mean_difference``) and a binary outcome (``sum``: hypergeometric draws;
  and the default covariance-adjusted statistic, whose residuals are continuous): wall time, CPU
  time of the process (with 2 free cores and the compiled kernels, wall ~ CPU / 2), and the
  tracemalloc peak above the interpreter's baseline (numpy's allocations are traced);
* baseline 1: ``scipy.stats.permutation_test`` (independent samples, vectorized difference of
  means) on ONE stratum of all n = 1M rows, the only case it covers, against our engine on the
  same single stratum;
* baseline 2: a Python loop shuffling the label column of a pandas DataFrame within each of 5
  strata (``sample(frac=1)``) and recomputing grouped means, against our engine on the same data;
  baselines run ``--baseline-resamples`` resamples and are compared per resample;
* the whole ``stratagap.analyze`` on 100k rows x 20 covariates with B resamples (in a child
  process: wall time, the wall and CPU time of each stage as the pipeline records them in
  ``run.json``, and peak resident memory above the child's baseline,
  against the size of the input table);
* a rate outcome (events over person-time, ``person_time=``) on 100k rows x 20 covariates
  with B resamples, against two baselines measured in the same child process on the same
  table: the whole analysis of a continuous outcome (each person's own rate, events / person-
  time, without ``person_time``), and one statsmodels Poisson GLM with a log person-time
  offset of the exposure and the covariates (the unit cost of one model fit at this size).

Not a test: no assertions (``tests/test_benchmarks_smoke.py`` runs ``--quick`` in the suite).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
import tracemalloc

import numpy as np
import pandas as pd
import scipy
from scipy import stats

from stratagap.inference._engines import compiled as _engine_jit
from stratagap.inference import permutation as P

TARGETS = {"continuous_1m_5": 10.0, "binary_sum_1m_5": 1.0, "analyze_s": 15.0,
           "analyze_memory_ratio": 5.0, "ratio": 100.0}


# ----------------------------------------------------------------------------- machine
def machine() -> dict:
    model = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.lower().startswith("model name"):
                    model = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        import numba
        numba_version = numba.__version__
    except ImportError:
        numba_version = None
    return {"cpu": model, "cores": os.cpu_count(), "load_1min": round(os.getloadavg()[0], 2),
            "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "pandas": pd.__version__, "numba": numba_version,
            "compiled_kernels": _engine_jit.jit_available(),
            "date": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")}


# ----------------------------------------------------------------------------- data
def engine_data(n, n_strata, seed=0):
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, n_strata, n)
    t = (rng.random(n) < 0.3).astype(np.int8)
    y = rng.normal(size=n) + 0.01 * t
    yb = (rng.random(n) < 0.1 + 0.002 * t).astype(float)
    return y, yb, t, labels


def analysis_table(n, p, seed=0):
    """Confounded invented data: p covariates (3/4 normal, 1/4 0/1), continuous outcome."""
    rng = np.random.default_rng(seed)
    n_bin = p // 4
    X = np.column_stack([rng.normal(size=(n, p - n_bin)),
                         (rng.random((n, n_bin)) < 0.4).astype(float)])
    q = min(6, p)  # the confounders
    lin = X[:, :q] @ np.full(q, 0.25) - 0.5
    t = (rng.random(n) < 1 / (1 + np.exp(-lin))).astype(int)
    y = X[:, :q] @ np.full(q, 0.5) + 0.3 * t + rng.normal(size=n)
    frame = pd.DataFrame(X, columns=[f"x{j:02d}" for j in range(p)])
    frame["exposed"] = t
    frame["outcome"] = y
    return frame


def rate_table(n, p, seed=0):
    """:func:`analysis_table` plus follow-up (``years``, uniform 0.5 to 4) and an event count
    (``events``, Poisson with mean years x rate; the rate rises with the confounders and is
    1.35 times higher in the exposed) and each person's own rate ``own_rate``."""
    frame = analysis_table(n, p, seed)
    rng = np.random.default_rng(seed + 1)
    q = min(6, p)
    x = frame[[f"x{j:02d}" for j in range(q)]].to_numpy()
    rate = 0.3 * np.exp(x @ np.full(q, 0.15) + np.log(1.35) * frame["exposed"].to_numpy())
    frame["years"] = rng.uniform(0.5, 4.0, n)
    frame["events"] = rng.poisson(frame["years"].to_numpy() * rate)
    frame["own_rate"] = frame["events"] / frame["years"]
    return frame.drop(columns="outcome")


# ----------------------------------------------------------------------------- timing
def timed(fn):
    """(result, wall s, CPU s, tracemalloc peak bytes above the start)."""
    tracemalloc.start()
    base = tracemalloc.get_traced_memory()[0]
    w0, c0 = time.perf_counter(), time.process_time()
    out = fn()
    wall, cpu = time.perf_counter() - w0, time.process_time() - c0
    peak = tracemalloc.get_traced_memory()[1] - base
    tracemalloc.stop()
    return out, wall, cpu, peak


def pandas_loop(y, t, labels, resamples, seed):
    """Baseline 2: shuffle the label column within strata with pandas, recompute means."""
    frame = pd.DataFrame({"y": y, "t": t, "s": labels})
    rng = np.random.default_rng(seed)
    out = np.empty(resamples)
    weights = frame.groupby("s").size() / len(frame)
    for b in range(resamples):
        parts = [g.assign(t=g["t"].sample(frac=1, random_state=rng).to_numpy())
                 for _, g in frame.groupby("s")]
        means = pd.concat(parts).groupby(["s", "t"])["y"].mean().unstack()
        out[b] = float(((means[1] - means[0]) * weights).sum())
    return out


def scipy_baseline(y, t, resamples):
    """Baseline 1: scipy.stats.permutation_test, independent samples, vectorized statistic."""
    def diff(x, z, axis):
        return np.mean(x, axis=axis) - np.mean(z, axis=axis)
    return stats.permutation_test((y[t == 1], y[t == 0]), diff, permutation_type="independent",
                                  vectorized=True, n_resamples=resamples,
                                  random_state=np.random.default_rng(1))


def engine_rows(sizes, strata, B, workers):
    rows = []
    warm = engine_data(5000, 5)  # compile the kernels (cached on disk after the first run)
    P.stratified_test(warm[0], warm[2], warm[3], estimand="ate", engine="monte_carlo",
                      resamples=300, seed=0)
    for n in sizes:
        for S in strata:
            y, yb, t, labels = engine_data(n, S)
            kw = dict(estimand="ate", engine="monte_carlo", resamples=B, seed=1,
                      workers=workers)
            cases = [("continuous", "mean_difference", y), ("binary", "sum", yb)]
            if n == max(sizes):  # default statistic on a binary outcome: residuals
                cases.append(("binary, adjusted", "mean_difference", yb - yb.mean()))
            for kind, stat, values in cases:
                res, wall, cpu, peak = timed(lambda: P.stratified_test(
                    values, t, labels, statistic=stat, **kw))
                rows.append(dict(n=n, strata=S, outcome=kind, statistic=stat, resamples=B,
                                 wall_s=wall, cpu_s=cpu, ms_per_resample=wall / B * 1e3,
                                 peak_mib=peak / 2**20, p_value=res.p_value))
                print(f"  n={n:>9,} S={S:>3} {kind:<17} {stat:<15} wall {wall:7.2f} s  "
                      f"cpu {cpu:7.2f} s  {wall / B * 1e3:7.3f} ms/resample  "
                      f"peak {peak / 2**20:7.1f} MiB", flush=True)
    return rows


def baselines(n, B, Bb, workers):
    y, _, t, labels = engine_data(n, 5)
    one = np.zeros(n, dtype=np.int64)
    kw = dict(estimand="ate", engine="monte_carlo", resamples=B, seed=1, workers=workers)
    _, ours1, _, _ = timed(lambda: P.stratified_test(y, t, one, **kw))
    _, sc, _, _ = timed(lambda: scipy_baseline(y, t, Bb))
    _, ours5, _, _ = timed(lambda: P.stratified_test(y, t, labels, **kw))
    _, pl, _, _ = timed(lambda: pandas_loop(y, t, labels, Bb, 1))
    out = {"n": n, "resamples": B, "baseline_resamples": Bb,
           "ours_one_stratum_ms": ours1 / B * 1e3, "scipy_ms": sc / Bb * 1e3,
           "ours_5_strata_ms": ours5 / B * 1e3, "pandas_loop_ms": pl / Bb * 1e3}
    out["ratio_scipy"] = out["scipy_ms"] / out["ours_one_stratum_ms"]
    out["ratio_pandas"] = out["pandas_loop_ms"] / out["ours_5_strata_ms"]
    print(f"  one stratum, n={n:,}: ours {out['ours_one_stratum_ms']:.3f} ms/resample, "
          f"scipy.stats.permutation_test {out['scipy_ms']:.1f} ms/resample: "
          f"ratio {out['ratio_scipy']:.0f}x")
    print(f"  5 strata, n={n:,}: ours {out['ours_5_strata_ms']:.3f} ms/resample, pandas "
          f"shuffle loop {out['pandas_loop_ms']:.1f} ms/resample: ratio "
          f"{out['ratio_pandas']:.0f}x", flush=True)
    return out


# ----------------------------------------------------------------------------- analyze
def _status_kib(field: str) -> int:
    """A memory field of /proc/self/status (kB): VmRSS now, VmHWM the peak of this process'
    own address space (unlike ru_maxrss, not inherited from the parent across fork + exec)."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"{field} not in /proc/self/status")


def _reset_peak() -> None:
    try:  # Linux >= 4.0: "5" resets VmHWM to the current RSS
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
    except OSError:
        pass


def analyze_child(path, B):
    """Run in a child process: one analysis, stage times and peak RSS above the baseline
    (resident memory after loading the table and a small warm-up analysis, so that neither
    building the table nor first-use imports count; the peak is VmHWM, reset after the
    warm-up where the kernel allows it, else an upper bound)."""
    import gc

    import stratagap

    frame = pd.read_pickle(path)
    n, p = len(frame), sum(c.startswith("x") for c in frame.columns)
    table_bytes = int(frame.memory_usage(deep=True).sum())
    covs = [c for c in frame.columns if c.startswith("x")]
    # a small warm-up analysis first: the modules it imports on first use are not data
    stratagap.analyze(analysis_table(400, p), exposure="exposed", outcome="outcome",
                      covariates=covs, resamples=100, seed=1)
    gc.collect()
    _reset_peak()
    base_kib = _status_kib("VmRSS")
    t0 = time.perf_counter()
    res = stratagap.analyze(frame, exposure="exposed", outcome="outcome",
                            covariates=covs, resamples=B, seed=1)
    wall = time.perf_counter() - t0
    peak_kib = _status_kib("VmHWM")
    d = res.to_dict()
    # the pipeline's own per-stage wall and CPU seconds (run.json "stages")
    print(json.dumps({"n": n, "p": p, "resamples": B, "wall_s": wall,
                      "cpu_s": sum(s["cpu"] for s in res.run["stages"].values()),
                      "stages": res.run["stages"],
                      "table_mib": table_bytes / 2**20,
                      "peak_above_baseline_mib": (peak_kib - base_kib) / 1024,
                      "p_value": d["test"]["p_value"]}))


def rate_child(path, B, repeats):
    """Run in a child process: the rate analysis, the continuous analysis of each person's own
    rate and one statsmodels Poisson GLM with offset, on the same table (after a warm-up),
    ``repeats`` times in turn; each keeps its run of least CPU time (other sessions' load
    inflates single runs unevenly)."""
    import statsmodels.api as sm

    import stratagap

    frame = pd.read_pickle(path)
    covs = [c for c in frame.columns if c.startswith("x")]
    common = dict(exposure="exposed", covariates=covs, seed=1)
    small = rate_table(1500, len(covs))
    stratagap.analyze(small, outcome="events", person_time="years", resamples=100, **common)
    stratagap.analyze(small, outcome="own_rate", resamples=100, **common)  # warm-ups

    def clock(fn):
        w0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        return out, time.perf_counter() - w0, time.process_time() - c0

    design = sm.add_constant(frame[["exposed", *covs]].to_numpy(dtype=float))
    runs = {
        "rate": lambda: stratagap.analyze(frame, outcome="events", person_time="years",
                                          resamples=B, **common),
        "continuous": lambda: stratagap.analyze(frame, outcome="own_rate", resamples=B,
                                                **common),
        "glm": lambda: sm.GLM(frame["events"].to_numpy(dtype=float), design,
                              family=sm.families.Poisson(),
                              offset=np.log(frame["years"].to_numpy())).fit()}
    best, every = {}, {name: [] for name in runs}
    for _ in range(repeats):
        for name, fn in runs.items():
            out, wall, cpu = clock(fn)
            every[name].append(cpu)
            if name not in best or cpu < best[name]["cpu_s"]:
                best[name] = {"wall_s": wall, "cpu_s": cpu, **(
                    {"stages": out.run["stages"]} if name != "glm" else {})}
    for name, row in best.items():
        row["all_cpu"] = every[name]
    print(json.dumps({"n": len(frame), "p": len(covs), "resamples": B, "repeats": repeats,
                      **best}))


def rate_run(n, p, B, repeats=2):
    """The rate-outcome row (see :func:`rate_child`); the child's BLAS runs one thread
    (``OPENBLAS_NUM_THREADS=1``: spinning BLAS threads on a shared machine count as CPU time
    and made the same score fit differ threefold between two runs)."""
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "rates.pkl")
        rate_table(n, p).to_pickle(path)
        cmd = [sys.executable, os.path.abspath(__file__), "--rate-child", path, str(B),
               str(repeats)]
        env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
        out = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if out.returncode:
        raise RuntimeError(f"rate child failed:\n{out.stderr[-3000:]}")
    row = json.loads(out.stdout.strip().splitlines()[-1])
    r, c, g = row["rate"], row["continuous"], row["glm"]
    row["ratio_continuous_cpu"] = r["cpu_s"] / c["cpu_s"]
    row["ratio_continuous_wall"] = r["wall_s"] / c["wall_s"]
    row["ratio_glm_cpu"] = r["cpu_s"] / max(g["cpu_s"], 1e-9)
    print(f"  rate outcome, {n:,} rows x {p} covariates, B={B:,}: {r['wall_s']:.1f} s "
          f"({r['cpu_s']:.1f} s CPU); continuous outcome on the same table {c['wall_s']:.1f} s "
          f"({c['cpu_s']:.1f} s CPU): {row['ratio_continuous_cpu']:.2f}x in CPU; one "
          f"statsmodels Poisson GLM {g['wall_s']:.2f} s ({g['cpu_s']:.2f} s CPU): "
          f"{row['ratio_glm_cpu']:.0f}x", flush=True)
    for k, v in sorted(r["stages"].items(), key=lambda kv: -kv[1]["cpu"]):
        base = c["stages"].get(k, {}).get("cpu")
        print(f"      {k:<20} {v['wall']:6.2f} s wall {v['cpu']:6.2f} s CPU"
              + ("" if base is None else f" (continuous {base:.2f} s CPU)"))
    return row


def rate_markdown(rr) -> list[str]:
    """The rate-outcome section of docs/performance.md."""
    r, c, g = rr["rate"], rr["continuous"], rr["glm"]
    L = ["", "## Rate outcomes (issue 13)", "",
         f"`stratagap.analyze(..., person_time=\"years\")` on {rr['n']:,} invented rows x "
         f"{rr['p']} covariates (Poisson counts over uniform 0.5-4 years of follow-up), "
         f"{rr['resamples']:,} resamples, against two baselines in the same child process on the "
         "same table: the whole analysis of each person's own rate (events / years) as a "
         "continuous outcome, and one statsmodels Poisson GLM with offset (exposure and the "
         f"covariates). Each ran {rr['repeats']} times in turn, the run of least CPU time kept "
         "(CPU seconds of every run: rate "
         f"{', '.join(f'{x:.1f}' for x in r['all_cpu'])}; continuous "
         f"{', '.join(f'{x:.1f}' for x in c['all_cpu'])}); BLAS on one thread "
         "(`OPENBLAS_NUM_THREADS=1`), the permutation engine on every core.", "",
         "| run | wall s | CPU s | rate analysis CPU / this CPU |", "| --- | ---: | ---: | ---: |",
         f"| rate outcome (`person_time`) | {r['wall_s']:.1f} | {r['cpu_s']:.1f} | 1 |",
         f"| continuous outcome, same table | {c['wall_s']:.1f} | {c['cpu_s']:.1f} | "
         f"{rr['ratio_continuous_cpu']:.2f}x |",
         f"| one statsmodels Poisson GLM | {g['wall_s']:.2f} | {g['cpu_s']:.2f} | "
         f"{rr['ratio_glm_cpu']:.0f}x |", "",
         "CPU seconds by stage (the pipeline's own clock; a rate outcome's test, effects, "
         "cross-checks and sensitivity analysis are one stage, `followup`, compared with the "
         "sum of those stages of the continuous run):", "",
         "| stage | rate CPU s | continuous CPU s |", "| --- | ---: | ---: |",
         f"| outcome stages (`followup`; continuous: {', '.join(OUTCOME_STAGES)}) | "
         f"{r['stages'].get('followup', {}).get('cpu', 0.0):.2f} | "
         f"{sum(c['stages'].get(k, {}).get('cpu', 0.0) for k in OUTCOME_STAGES):.2f} |"]
    for k, v in sorted(r["stages"].items(), key=lambda kv: -kv[1]["cpu"]):
        if k == "followup" or v["cpu"] < 0.005:
            continue
        base = c["stages"].get(k, {}).get("cpu")
        L.append(f"| {k} | {v['cpu']:.2f} | {'' if base is None else f'{base:.2f}'} |")
    return L


#: the continuous pipeline's stages that a rate outcome runs inside its one `followup` stage
OUTCOME_STAGES = ("tests", "effects", "cross_checks", "heterogeneity", "sensitivity",
                  "negative_control")


def analyze_run(n, p, B):
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "table.pkl")
        analysis_table(n, p).to_pickle(path)
        cmd = [sys.executable, os.path.abspath(__file__), "--analyze-child", path, str(B)]
        out = subprocess.run(cmd, capture_output=True, text=True)
    if out.returncode:
        raise RuntimeError(f"analysis child failed:\n{out.stderr[-3000:]}")
    row = json.loads(out.stdout.strip().splitlines()[-1])
    row["memory_ratio"] = row["peak_above_baseline_mib"] / row["table_mib"]
    print(f"  analyze {n:,} rows x {p} covariates, B={B:,}: {row['wall_s']:.1f} s "
          f"({row['cpu_s']:.1f} s CPU); peak RSS "
          f"+{row['peak_above_baseline_mib']:.0f} MiB = {row['memory_ratio']:.1f}x the "
          f"{row['table_mib']:.1f} MiB table")
    for k, v in sorted(row["stages"].items(), key=lambda kv: -kv[1]["wall"]):
        print(f"      {k:<32} {v['wall']:6.2f} s wall {v['cpu']:6.2f} s CPU")
    return row


def matching_run(n1, n0, per_exposed=1, seed=0):
    """Optimal 1:K caliper matching (stratify/matching.py) of n1 exposed among n0 reference
    units, logits N(0.5, 1) and N(0, 1); beside it, in the same run, one np.argsort of the
    pooled logits (the sort the caliper graph is built from) as the reference cost."""
    from stratagap.stratify.matching import match_on_score
    rng = np.random.default_rng(seed)
    logit = np.concatenate([rng.normal(0.5, 1.0, n1), rng.normal(0.0, 1.0, n0)])
    t = np.r_[np.ones(n1, dtype=np.int8), np.zeros(n0, dtype=np.int8)]
    # plain clocks, no tracemalloc: tracing every small allocation of the piece-by-piece loop
    # (tens of thousands of pieces) would more than triple the time measured at 1:1
    w0, c0 = time.perf_counter(), time.process_time()
    m = match_on_score(logit, t, per_exposed=per_exposed)
    wall, cpu = time.perf_counter() - w0, time.process_time() - c0
    w0 = time.perf_counter()
    np.argsort(logit)
    sort_wall = time.perf_counter() - w0
    row = dict(n_exposed=n1, n_reference=n0, per_exposed=per_exposed, wall_s=wall, cpu_s=cpu,
               matched=m.matched_exposed,
               reference_used=m.reference_used, edges=m.graph["edges"], sort_s=sort_wall,
               ratio_to_sort=wall / max(sort_wall, 1e-9))
    print(f"  matching 1:{per_exposed}, {n1:,} exposed among {n0:,}: {wall:.1f} s wall "
          f"({cpu:.1f} s CPU), {m.matched_exposed:,} matched, {m.reference_used:,} reference "
          f"used, {m.graph['edges']:,} edges; {row['ratio_to_sort']:.0f}x one argsort of the "
          "logits", flush=True)
    return row


# ----------------------------------------------------------------------------- report
def markdown(info, rows, base, an, args, match=None, rates=None) -> str:
    ok = lambda flag: "met" if flag else "NOT met"  # noqa: E731
    big = max(r["n"] for r in rows)
    cont = next((r for r in rows if r["n"] == big and r["strata"] == 5
                 and r["outcome"] == "continuous"), None)
    bsum = next((r for r in rows if r["n"] == big and r["strata"] == 5
                 and r["outcome"] == "binary"), None)
    L = ["# Performance", "",
         "Generated by `python tests/benchmarks/run_benchmarks.py --write docs/performance.md`"
         " (every number below comes from one run of that command; rerun it to reproduce).",
         "", "## Machine", "",
         f"- CPU: {info['cpu']}, {info['cores']} cores; load average (1 min) at the start "
         f"{info['load_1min']} (other work on the machine slows every figure, most of all "
         "the 2-thread ones)",
         f"- Python {info['python']}, numpy {info['numpy']}, scipy {info['scipy']}, pandas "
         f"{info['pandas']}, numba {info['numba']}; compiled kernels "
         f"{'on' if info['compiled_kernels'] else 'off (STRATAGAP_NO_JIT or no numba)'}",
         f"- Date: {info['date']}; engine threads: "
         f"{args.workers if args.workers else 'default (every core with compiled kernels)'}",
         "", "## Targets (issue 6, 2 cores)", "",
         "| target | goal | measured | status |", "| --- | --- | --- | --- |"]
    if cont:
        L.append(f"| continuous, n = {big:,}, 5 strata, {cont['resamples']:,} resamples | "
                 f"<= 10 s | {cont['wall_s']:.1f} s wall ({cont['cpu_s']:.1f} s CPU) | "
                 f"{ok(cont['wall_s'] <= 10)} |")
    if bsum:
        L.append(f"| binary sum, same size | <= 1 s | {bsum['wall_s']:.2f} s | "
                 f"{ok(bsum['wall_s'] <= 1)} |")
    if base:
        L.append(f"| vs scipy.stats.permutation_test, one stratum, n = {base['n']:,} | >= 100x"
                 f" | {base['ratio_scipy']:.0f}x | {ok(base['ratio_scipy'] >= 100)} |")
        L.append(f"| vs pandas shuffle loop, 5 strata, n = {base['n']:,} | >= 100x | "
                 f"{base['ratio_pandas']:.0f}x | {ok(base['ratio_pandas'] >= 100)} |")
    if an:
        L.append(f"| analyze, {an['n']:,} rows x {an['p']} covariates, {an['resamples']:,} "
                 f"resamples | <= 15 s | {an['wall_s']:.1f} s | {ok(an['wall_s'] <= 15)} |")
        L.append(f"| analyze peak memory | <= 5x the input table ({an['table_mib']:.1f} MiB) | "
                 f"+{an['peak_above_baseline_mib']:.0f} MiB ({an['memory_ratio']:.1f}x) | "
                 f"{ok(an['memory_ratio'] <= 5)} |")
    for mr in match or ():
        L.append(f"| optimal 1:{mr['per_exposed']} matching, {mr['n_exposed']:,} exposed among "
                 f"{mr['n_reference']:,} (issue 12) | < 60 s | {mr['wall_s']:.1f} s "
                 f"({mr['ratio_to_sort']:.0f}x one argsort of the logits; "
                 f"{mr['edges']:,} edges) | {ok(mr['wall_s'] < 60)} |")
    L += ["", "## Engine: absolute times", "",
          "Monte Carlo engine, exposed share 0.3, estimand ATE; wall and process CPU time; peak"
          " = tracemalloc peak above the start of the call (numpy's buffers are traced).", "",
          "| n | strata | outcome | statistic | resamples | wall s | CPU s | ms/resample | "
          "peak MiB |", "| ---: | ---: | --- | --- | ---: | ---: | ---: | ---: | ---: |"]
    for r in rows:
        L.append(f"| {r['n']:,} | {r['strata']} | {r['outcome']} | {r['statistic']} | "
                 f"{r['resamples']:,} | {r['wall_s']:.2f} | {r['cpu_s']:.2f} | "
                 f"{r['ms_per_resample']:.3f} | {r['peak_mib']:.1f} |")
    if base:
        L += ["", "## Against the baselines (same run, same data)", "",
              f"Baselines ran {base['baseline_resamples']} resamples, our engine "
              f"{base['resamples']:,}; compared per resample.", "",
              "| case | ours ms/resample | baseline ms/resample | ratio |",
              "| --- | ---: | ---: | ---: |",
              f"| one stratum, n = {base['n']:,}: scipy.stats.permutation_test | "
              f"{base['ours_one_stratum_ms']:.3f} | {base['scipy_ms']:.1f} | "
              f"{base['ratio_scipy']:.0f}x |",
              f"| 5 strata, n = {base['n']:,}: pandas `sample(frac=1)` loop | "
              f"{base['ours_5_strata_ms']:.3f} | {base['pandas_loop_ms']:.1f} | "
              f"{base['ratio_pandas']:.0f}x |"]
    if an:
        L += ["", "## Whole analysis", "",
              f"`stratagap.analyze` on {an['n']:,} invented rows x {an['p']} covariates, "
              f"continuous outcome, {an['resamples']:,} resamples, in a child process: "
              f"{an['wall_s']:.1f} s ({an['cpu_s']:.1f} s CPU); peak resident memory {an['peak_above_baseline_mib']:.0f}"
              f" MiB above the child's resident memory after loading the table, "
              f"{an['memory_ratio']:.1f}x the {an['table_mib']:.1f} MiB input table.", "",
              "Stage times are the pipeline's own (`run.json` `stages`: wall and CPU seconds).", "",
              "| stage | wall s | CPU s |", "| --- | ---: | ---: |"]
        for k, v in sorted(an["stages"].items(), key=lambda kv: -kv[1]["wall"]):
            L.append(f"| {k} | {v['wall']:.2f} | {v['cpu']:.2f} |")
    if rates:
        L += rate_markdown(rates)
    L += ["", "## How the engine gets there", "", NOTES]
    return "\n".join(L) + "\n"


NOTES = """\
- Only the smaller group of each stratum is drawn; the exposed sum is that draw's sum or the
  stratum total minus it.
- Random-byte threshold draw: one random byte per unit and resample (numpy's
  `random_raw`, about 0.5 ns per unit: the largest single cost left); the byte value at which
  the count first reaches the group size; the few units at that byte are picked by 64-bit keys.
  Exactly uniform subsets, no sort.
- Compiled kernels (numba, `nogil`) for the count, the selection and the sums: about 2.3 ns of
  CPU per unit and resample in all (random bytes included; see the CPU column), several times
  less than the numpy version, which remains as the fallback (`STRATAGAP_NO_JIT=1` or numba
  missing). Both add in one fixed order (8 lanes)
  so they give bit-identical results; `tests/inference/test_compiled.py` checks that.
- Threads draw whole blocks of 250 resamples (streams keyed by block), so results do not depend
  on the number of threads or the batch size; with the compiled kernels every core is used by
  default.
- On a shared machine read wall time beside CPU time: wall close to CPU means only one core
  was free during that row (2 free cores give wall close to CPU / 2).
- Binary outcome with the sum statistic: one hypergeometric draw per stratum and resample (and
  the exact convolution, chosen automatically).
- Small strata (matched sets, at most 64 units): all shuffled together by one sort of random keys.
- `analyze` draws the shuffles once for the default test, its studentized companion and the
  constant-effect inversion (`permutation.shared_draws`): bit-identical to separate runs.
- Progress: default batches hold at most about 0.5 s of drawing (one block at n = 1M), so the
  progress callback is called at least every ~0.5-1 s on long runs.
- Normal engine: never chosen automatically (see `engine_note` on every test result); its
  p-value is reported beside the Monte Carlo one.
"""


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smoke size: seconds")
    ap.add_argument("--resamples", type=int, default=10_000)
    ap.add_argument("--baseline-resamples", type=int, default=100)
    ap.add_argument("--workers", type=int, default=None)
    ap.add_argument("--write", metavar="PATH", help="write the markdown table to PATH")
    ap.add_argument("--skip-analyze", action="store_true")
    ap.add_argument("--matching-only", action="store_true",
                    help="only the matching rows (1:1 and 1:3), printed")
    ap.add_argument("--rates-only", action="store_true",
                    help="only the rate-outcome row (100,000 rows), printed")
    ap.add_argument("--analyze-child", nargs=2, help=argparse.SUPPRESS)
    ap.add_argument("--rate-child", nargs=3, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.analyze_child:
        analyze_child(a.analyze_child[0], int(a.analyze_child[1]))
        return 0
    if a.rate_child:
        rate_child(a.rate_child[0], int(a.rate_child[1]), int(a.rate_child[2]))
        return 0
    if a.quick:
        sizes, strata, B, Bb, big, an_size = [5000], [5], 250, 2, 5000, (1500, 4, 200)
        match_size, rate_size = (1000, 10_000), (2000, 4, 200, 1)
    else:
        sizes, strata, B, Bb = [10_000, 100_000, 1_000_000], [5, 50], a.resamples, \
            a.baseline_resamples
        big, an_size = 1_000_000, (100_000, 20, a.resamples)
        match_size, rate_size = (100_000, 1_000_000), (100_000, 20, a.resamples, 2)
    if a.rates_only:
        rate_run(*rate_size)
        return 0
    if a.matching_only:
        for k in (1, 3):
            matching_run(*match_size, per_exposed=k)
        return 0
    info = machine()
    print(f"machine: {info['cpu']}, {info['cores']} cores, load {info['load_1min']}; numpy "
          f"{info['numpy']}, scipy {info['scipy']}, numba {info['numba']}, compiled kernels "
          f"{info['compiled_kernels']}", flush=True)
    print("engine:")
    rows = engine_rows(sizes, strata, B, a.workers)
    print("baselines:")
    base = baselines(big, B, Bb, a.workers)
    print("matching:")
    match = [matching_run(*match_size, per_exposed=k) for k in (1, 3)]
    an = rates = None
    if not a.skip_analyze:
        print("whole analysis:")
        an = analyze_run(*an_size)
        print("rate outcome:")
        rates = rate_run(*rate_size)
    if a.write:
        text = markdown(info, rows, base, an, a, match, rates)
        tmp = a.write + ".tmp"
        with open(tmp, "w") as fh:
            fh.write(text)
        os.replace(tmp, a.write)  # atomic
        print(f"wrote {a.write}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
