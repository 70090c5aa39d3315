"""Cost of the flexible default: the whole analysis with spline terms beside linear terms.

    python tests/benchmarks/bench_terms.py                 # 100,000 rows x 20 covariates
    python tests/benchmarks/bench_terms.py --n 20000       # quicker

Both analyses run in one invocation, each in its own child process on the same invented table
(``run_benchmarks.analysis_table``: 15 normal and 5 binary covariates, continuous outcome),
10,000 resamples, after a small warm-up analysis. Prints the wall and CPU seconds of each
(from the pipeline's own per-stage clock, ``run.json`` "stages"), the ratio spline / linear, and
the stages that grew most. Not a test: no assertions.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from run_benchmarks import analysis_table, machine  # noqa: E402


def child(path, terms, B):
    import pandas as pd

    import stratagap

    frame = pd.read_pickle(path)
    covs = [c for c in frame.columns if c.startswith("x")]
    stratagap.analyze(analysis_table(400, len(covs)), exposure="exposed", outcome="outcome",
                      covariates=covs, resamples=100, seed=1, terms=terms)  # warm-up
    t0 = time.perf_counter()
    res = stratagap.analyze(frame, exposure="exposed", outcome="outcome", covariates=covs,
                            resamples=B, seed=1, terms=terms)
    wall = time.perf_counter() - t0
    print(json.dumps({"terms": terms, "wall_s": wall, "stages": res.run["stages"],
                      "cpu_s": sum(s["cpu"] for s in res.run["stages"].values()),
                      "design_columns": len(res.prepared_summary.design_columns),
                      "estimate": res.adjusted.estimate}))


def run(n, p, B):
    rows = {}
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "table.pkl")
        analysis_table(n, p).to_pickle(path)
        for terms in ("spline", "linear"):
            out = subprocess.run([sys.executable, os.path.abspath(__file__), "--child", path,
                                  terms, str(B)], capture_output=True, text=True)
            if out.returncode:
                raise RuntimeError(out.stderr[-3000:])
            rows[terms] = json.loads(out.stdout.strip().splitlines()[-1])
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--p", type=int, default=20)
    ap.add_argument("--resamples", type=int, default=10_000)
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.child:
        child(a.child[0], a.child[1], int(a.child[2]))
        return 0
    print(json.dumps(machine()))
    rows = run(a.n, a.p, a.resamples)
    s, lin = rows["spline"], rows["linear"]
    print(f"analyze {a.n:,} rows x {a.p} covariates, {a.resamples:,} resamples")
    for r in (s, lin):
        print(f"  {r['terms']:<7} {r['design_columns']:3d} design columns: {r['wall_s']:6.2f} s "
              f"wall, {r['cpu_s']:6.2f} s CPU")
    print(f"  ratio spline / linear: {s['wall_s'] / lin['wall_s']:.2f}x wall, "
          f"{s['cpu_s'] / lin['cpu_s']:.2f}x CPU")
    print("  stage                spline CPU s  linear CPU s")
    for k in sorted(s["stages"], key=lambda k: -s["stages"][k]["cpu"]):
        print(f"  {k:<20} {s['stages'][k]['cpu']:12.2f}  {lin['stages'].get(k, {}).get('cpu', 0):12.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
