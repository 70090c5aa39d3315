"""Fixed analyses whose outputs are kept as golden files (tests/golden/<case>/).

A change that moves code without meaning to change results must leave every file identical:
`results.json`, `balance.csv`, `strata.csv` and the plain-text summary. Regenerate on purpose
only, in a commit of its own that says what moved and why:

    python tests/golden/cases.py --write
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
FILES = ("results.json", "balance.csv", "strata.csv", "summary.txt")


def _demo_frame(n=1500, seed=31, holes=False):
    from stratagap.demo import make_shift_work_data
    frame = make_shift_work_data(n=n, seed=seed).drop(columns=["_true_effect"])
    if holes:  # covariate values missing at random, for the indicator policy
        rng = np.random.default_rng(7)
        frame.loc[rng.random(len(frame)) < 0.08, "bmi"] = np.nan
        frame.loc[rng.random(len(frame)) < 0.05, "role"] = None
    return frame


def _nhefs():
    from causaldata import nhefs
    d = nhefs.load_pandas().data.copy()
    for col in ("sex", "race", "education", "exercise", "active"):
        d[col] = d[col].astype(str)
    return d


NHEFS_COVARIATES = ["sex", "race", "age", "education", "smokeintensity", "smokeyrs",
                    "exercise", "active", "wt71"]


def _pairs():
    """Matched pairs (one exposed, one reference per pair) with a binary outcome."""
    rng = np.random.default_rng(404)
    n_pairs = 240
    x = np.repeat(rng.normal(size=n_pairs), 2) + rng.normal(scale=0.2, size=2 * n_pairs)
    t = np.tile([1, 0], n_pairs)
    y = (rng.random(2 * n_pairs) < 1 / (1 + np.exp(-(-0.8 + 0.7 * x + 0.5 * t)))).astype(int)
    return pd.DataFrame({"pair": np.repeat(np.arange(n_pairs), 2),
                         "treated": np.where(t == 1, "yes", "no"), "x": x, "event": y})


def cases():
    """name -> (table, keyword arguments of stratagap.analyze)."""
    return {
        "demo": (lambda: _demo_frame(n=3000, seed=2026),
                 dict(exposure="shift", exposed_value="nights", outcome="systolic_bp",
                      covariates=["age", "bmi", "smoker", "role"],
                      negative_control="hearing_db", seed=2026)),
        "nhefs_continuous": (lambda: _nhefs().loc[lambda d: d["wt82_71"].notna()],
                             dict(exposure="qsmk", exposed_value=1, outcome="wt82_71",
                                  covariates=NHEFS_COVARIATES, resamples=1999, seed=3)),
        "nhefs_binary_att": (_nhefs,
                             dict(exposure="qsmk", exposed_value=1, outcome="death",
                                  covariates=NHEFS_COVARIATES, estimand="att", measure="rr",
                                  resamples=1999, seed=4)),
        "matched_pairs": (_pairs,
                          dict(exposure="treated", exposed_value="yes", outcome="event",
                               covariates=["x"], strata_column="pair", alternative="greater",
                               resamples=1999, seed=5)),
        "formula": (_demo_frame,
                    dict(exposure="shift", exposed_value="nights", outcome="systolic_bp",
                         covariates=None,
                         formula="age + I(age**2) + bmi + smoker + C(role) + age:smoker",
                         resamples=1999, seed=6)),
        "missing_indicator": (lambda: _demo_frame(holes=True),
                              dict(exposure="shift", exposed_value="nights",
                                   outcome="systolic_bp", covariates=["age", "bmi", "smoker",
                                                                      "role"],
                                   missing="indicator", resamples=1999, seed=8)),
    }


def render(name) -> dict[str, str]:
    """The four golden files of one case, as text."""
    import stratagap
    from stratagap.render.files import balance_csv, strata_csv
    from stratagap.render.summary import render_summary
    from stratagap.result import to_json

    make, options = cases()[name]
    result = stratagap.analyze(make(), **options)
    data = result.to_dict()
    return {"results.json": to_json(data), "balance.csv": balance_csv(data),
            "strata.csv": strata_csv(data), "summary.txt": render_summary(data)}


def main(argv):
    if "--write" not in argv:
        print(__doc__)
        return 2
    for name in cases():
        folder = HERE / name
        folder.mkdir(exist_ok=True)
        for file, text in render(name).items():
            (folder / file).write_text(text, encoding="utf-8")
        print("wrote", folder)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
