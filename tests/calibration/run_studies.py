"""Run the calibration and coverage studies on demand and print their figures.

    python tests/calibration/run_studies.py --full           # the full studies (docs/validation.md)
    python tests/calibration/run_studies.py                  # the reduced studies CI runs
    python tests/calibration/run_studies.py --full --only a_default,cover_ate

Every dataset goes through ``stratagap.analyze`` (see :mod:`calibration.studies` for the
options each study sets). Prints one Markdown row per study and the CPU seconds spent in the
analyses (summed over the worker processes); exits 1 if a study fails its acceptance rule.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/: the calibration package

from calibration.studies import STUDIES, run_study, summarize  # noqa: E402


def _row(s: dict) -> str:
    if "agree" in s:
        figures = (f"decisions agree {100 * s['agree']:.1f} %; max |z| {s['max_abs_z']:.2f}; "
                   f"mean z {s['mean_z']:+.3f}; max |p_mc - p_normal| {s['max_abs_diff']:.4f}")
    elif "bias" in s:
        figures = (f"**{100 * s['rate']:.2f} %** (SE {100 * s['se']:.2f}); mean error "
                   f"{s['bias']:+.4f} = {s['bias_in_se']:+.2f} SE; mean width {s['width']:.3f}")
    else:
        figures = f"**{100 * s['rate']:.2f} %** (SE {100 * s['se']:.2f})"
    verdict = "pass" if s["passed"] else "**FAIL**"
    figures, rule = (text.replace("|", "\\|") for text in (figures, s["rule"]))  # Markdown cells
    return (f"| {s['study']} | {s['description']} | {s['m']:,} | {figures} | {rule} | "
            f"{verdict} | {s['cpu_seconds']:.0f} |")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--full", action="store_true", help="the full studies (default: reduced)")
    parser.add_argument("--only", default="", help="comma-separated study names")
    parser.add_argument("--workers", type=int, default=None, help="worker processes (default 2)")
    args = parser.parse_args(argv)
    size = "full" if args.full else "reduced"
    names = [n for n in args.only.split(",") if n] or list(STUDIES)
    unknown = sorted(set(names) - set(STUDIES))
    if unknown:
        parser.error(f"unknown study {', '.join(unknown)}; choose from {', '.join(STUDIES)}")
    print(f"| study | what | datasets | measured | acceptance | result | CPU s |")
    print("|---|---|---|---|---|---|---|")
    failed, cpu, started = 0, 0.0, time.perf_counter()
    for name in names:
        study = STUDIES[name]
        if size not in study.band:
            continue
        summary = summarize(study, run_study(study, study.m(size), workers=args.workers), size)
        cpu += summary["cpu_seconds"]
        failed += not summary["passed"]
        print(_row(summary), flush=True)
    print(f"\n{size} studies: {cpu:.0f} CPU-seconds in the analyses, "
          f"{time.perf_counter() - started:.0f} s wall; {failed} failed")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
