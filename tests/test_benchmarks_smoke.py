"""Smoke run of the benchmark code (``tests/benchmarks/run_benchmarks.py --quick``).

No timing assertions (speed is shown by the benchmark's printed ratios, never by timed tests):
this only checks that the benchmark command runs end to end and writes its table, so that the
command documented in docs/performance.md keeps working.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

SCRIPT = Path(__file__).parent / "benchmarks" / "run_benchmarks.py"


def _load():
    spec = importlib.util.spec_from_file_location("run_benchmarks", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_quick_benchmark_runs_and_writes_the_table(tmp_path, capsys):
    bench = _load()
    out = tmp_path / "performance.md"
    assert bench.main(["--quick", "--write", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "scipy.stats.permutation_test" in printed and "pandas shuffle loop" in printed
    text = out.read_text()
    for heading in ("## Machine", "## Targets", "## Engine: absolute times",
                    "## Against the baselines", "## Whole analysis", "## Rate outcomes (issue 13)"):
        assert heading in text
    assert "| 5,000 | 5 | continuous | mean_difference | 250 |" in text
