"""Writing a result to a folder, safely.

Every file is written to a temporary name in the target folder and renamed into place
(``os.replace`` is atomic on POSIX), so a crash never leaves a half-written file. No output path
may be, or lie inside, an input path, and an existing non-empty folder is refused unless
``overwrite`` is set or the folder carries this package's demo marker.
"""

from __future__ import annotations

import csv
import io
import os
import tempfile
from pathlib import Path

from ..errors import InputError
from ..result import AnalysisResult, to_json
from ..stratify.balance import CSV_COLUMNS as BALANCE_COLUMNS
from .tables import STRATA_COLUMNS, strata_with_estimates

__all__ = ["prepare_folder", "write_atomic", "write_result", "DEMO_MARKER"]

DEMO_MARKER = ".stratagap-demo"

#: Every name this package may write into an output folder (the report adds figures/).
OUTPUT_NAMES = ("results.json", "run.json", "balance.csv", "strata.csv", "report.html",
                "baseline.csv", "baseline.md", "baseline.tex", "shift_work.csv", "sick_leave.csv",
                "truth.json",
                "matched_sets.csv", "figures", DEMO_MARKER)


def prepare_folder(out: str | Path, *, inputs=(), overwrite: bool = False,
                   demo: bool = False) -> Path:
    """Check and create the output folder; refuse unsafe targets with a one-line InputError."""
    out = Path(out).expanduser()
    resolved = out.resolve()
    for item in inputs:
        if item is None:
            continue
        inp = Path(item).expanduser().resolve()
        if resolved == inp or inp in resolved.parents:
            raise InputError(f"`out` {str(out)!r} is the input file or lies inside it; "
                             "choose a separate folder")
        if inp.parent == resolved and inp.name in OUTPUT_NAMES or resolved / "figures" in inp.parents:
            raise InputError(f"`out` {str(out)!r} would overwrite the input file {inp.name!r}; "
                             "choose another folder")
    if resolved.exists() and not resolved.is_dir():
        raise InputError(f"`out` {str(out)!r} exists and is not a folder; choose a folder path")
    if resolved.is_dir() and any(resolved.iterdir()):
        ours = demo and (resolved / DEMO_MARKER).is_file()
        if not (overwrite or ours):
            raise InputError(f"`out` folder {str(out)!r} is not empty; choose a new folder or "
                             "pass `overwrite` to replace its files")
    try:
        resolved.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"`out` folder {str(out)!r} cannot be created ({exc.strerror}); "
                         "choose a writable location") from None
    if demo:
        write_atomic(resolved / DEMO_MARKER, "written by `stratagap demo`; the demo may replace "
                     "the files in this folder\n")
    return resolved


def write_atomic(path: Path, content: str | bytes) -> None:
    """Write to a temporary file beside ``path`` and rename it into place."""
    path = Path(path)
    data = content.encode("utf-8") if isinstance(content, str) else content
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _csv(rows: list[dict], columns: list[str]) -> str:
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=columns, extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in columns})
    return buf.getvalue()


def balance_csv(data: dict) -> str:
    """balance.csv: one row per balance term, from ``result.to_dict()``."""
    return _csv(data["balance"]["rows"], BALANCE_COLUMNS)


def strata_csv(data: dict) -> str:
    """strata.csv: the strata joined with the headline's per-stratum estimates."""
    return _csv(strata_with_estimates(data), STRATA_COLUMNS)


def matched_sets_csv(sets: dict) -> str:
    """matched_sets.csv: set, row (0-based row of the input file), group, logit_gap."""
    rows = [{"set": int(a), "row": int(b), "group": c, "logit_gap": repr(float(d))}
            for a, b, c, d in zip(sets["set"], sets["row"], sets["group"], sets["logit_gap"])]
    return _csv(rows, ["set", "row", "group", "logit_gap"])


def write_result(result: AnalysisResult, folder: Path, *, report: bool = True) -> list[Path]:
    """Write results.json, run.json, balance.csv, strata.csv (and the report) into ``folder``."""
    folder = Path(folder)
    data = result.to_dict()
    written = []

    def put(name, content):
        write_atomic(folder / name, content)
        written.append(folder / name)

    put("results.json", to_json(data))
    put("run.json", to_json(result.run))  # timings and versions: kept out of results.json
    put("balance.csv", balance_csv(data))
    put("strata.csv", strata_csv(data))
    sets = (result.arrays or {}).get("matched_sets")
    if sets is not None:  # design=match: one row per matched unit
        put("matched_sets.csv", matched_sets_csv(sets))
    if report:
        from .report import write_report  # matplotlib loads only when a report is written
        written.extend(write_report(result, folder, write=write_atomic))
    return written
