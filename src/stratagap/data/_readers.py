"""Reading an input table from CSV, Parquet, Stata (.dta), SAS transport (.xpt), SPSS (.sav)
or Excel (.xlsx) files.

The reader is chosen by the file's suffix, and the first bytes of the file are checked against
what that suffix promises (Parquet files start with ``PAR1``, Stata 13+ files with
``<stata_dta>``, SAS transport files with a ``HEADER RECORD`` line, SPSS files with ``$FL2`` or
``$FL3``, .xlsx workbooks are zip archives starting ``PK``), so that a CSV saved under a
``.parquet`` name gets a one-line message saying what the file really is instead of a parser
traceback. Files are only ever opened for reading.

A semicolon-separated file often writes decimals with a comma (``3,25``): such a column is read
as numbers when every value in it is a decimal-comma number, and refused as ambiguous when only
some are.
"""

from __future__ import annotations

import csv
import io
import re
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError

__all__ = ["read_table", "SUFFIXES"]

#: File suffix -> format read from it.
SUFFIXES = {
    ".csv": "csv", ".tsv": "csv", ".txt": "csv",
    ".parquet": "parquet", ".pq": "parquet",
    ".dta": "stata",
    ".xpt": "xport",
    ".sav": "spss", ".zsav": "spss",
    ".xlsx": "excel",
}
_LABELS = {"csv": "CSV/text", "parquet": "Parquet", "stata": "Stata .dta",
           "xport": "SAS transport (.xpt)", "spss": "SPSS .sav", "excel": "Excel .xlsx"}
_SUGGESTED_SUFFIX = {"csv": ".csv", "parquet": ".parquet", "stata": ".dta", "xport": ".xpt",
                              "spss": ".sav", "excel": ".xlsx"}
#: Formats we recognise but do not read, with what to do instead.
_UNREAD = {".xls": "an old Excel workbook (.xls); save it as CSV (or as .xlsx)",
           ".xlsm": "an Excel workbook with macros; save the sheet as CSV (or as .xlsx)",
           ".ods": "an OpenDocument spreadsheet; save the sheet as CSV",
           ".sas7bdat": "a SAS data set; export it as SAS transport (.xpt) or CSV",
           ".rds": "an R data file; write it out with write.csv or arrow::write_parquet",
           ".json": "a JSON file; save the table as CSV or Parquet"}
#: A number written with a decimal comma (no thousands separators): 3,25  -0,5  12  1,5e-3
_DECIMAL_COMMA = re.compile(r"^\s*[+-]?(\d+(,\d*)?|,\d+)([eE][+-]?\d+)?\s*$")
_DELIMITERS = (",", ";", "\t")
_SNIFF_BYTES = 64 * 1024
_IBM_ZERO = 16.0 ** -65  # what pandas returns for an IBM-float zero


def read_table(path, *, encoding: str | None = None) -> pd.DataFrame:
    """Read a data table from a CSV, Parquet, Stata or SAS transport file.

    Parameters
    ----------
    path : str or os.PathLike
        The input file. Its suffix chooses the reader: ``.csv``/``.tsv``/``.txt`` (delimiter
        ``,``, ``;`` or tab, detected), ``.parquet``/``.pq``, ``.dta``, ``.xpt``.
    encoding : str, optional
        Text encoding of a CSV file or of the character columns of an ``.xpt`` file.
        Default UTF-8 (a byte-order mark is accepted).

    Returns
    -------
    pandas.DataFrame
        The table as read, one column per variable.

    Raises
    ------
    InputError
        Missing file, a directory, an empty file, a header without data rows, duplicate column
        names, an unknown suffix, content that does not match the suffix, or an undecodable
        encoding.

    Notes
    -----
    The file is opened read-only and never modified.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"input file '{p}' does not exist; check the path")
    if p.is_dir():
        raise InputError(f"input '{p}' is a directory, not a file; pass the path of a data file")
    if p.stat().st_size == 0:
        raise InputError(f"input file '{p}' is empty (0 bytes); export the data again")
    fmt = SUFFIXES.get(p.suffix.lower())
    if fmt is None and p.suffix.lower() in _UNREAD:
        raise InputError(f"input file '{p}' is {_UNREAD[p.suffix.lower()]}")
    if fmt is None:
        raise InputError(
            f"input file '{p}' has unknown suffix '{p.suffix}'; supported: "
            f"{', '.join(sorted(SUFFIXES))} (rename the file if its content is one of these)")
    with open(p, "rb") as fh:
        head = fh.read(_SNIFF_BYTES)
    found = _sniff(head)
    if found is not None and found != fmt:
        raise InputError(
            f"input file '{p}' is named {p.suffix} but its content is {_LABELS[found]}; "
            f"rename it to end in {_SUGGESTED_SUFFIX[found]} or export it as {_LABELS[fmt]}")
    if found is None and fmt != "csv":
        raise InputError(
            f"input file '{p}' is named {p.suffix} but does not look like a {_LABELS[fmt]} file; "
            "check that it was exported correctly")
    reader = {"csv": _read_csv, "parquet": _read_parquet, "stata": _read_stata,
              "xport": _read_xport, "spss": _read_spss, "excel": _read_excel}[fmt]
    table = reader(p, encoding)
    if table.shape[1] == 0:
        raise InputError(f"input file '{p}' has no columns; export the data again with a header row")
    _check_duplicates(p, [str(c) for c in table.columns])
    if len(table) == 0:
        raise InputError(f"input file '{p}' has a header but no data rows; export the data rows too")
    return table


def _sniff(head: bytes) -> str | None:
    """Return the format the first bytes reveal, "csv" for plain text, None if unknown."""
    if head.startswith(b"PAR1"):
        return "parquet"
    if head.startswith(b"<stata_dta>"):
        return "stata"
    if head.startswith(b"HEADER RECORD*******LIB") or head.startswith(b"HEADER RECORD*******LIBV8"):
        return "xport"
    if head.startswith((b"$FL2", b"$FL3")):
        return "spss"
    if head.startswith(b"PK\x03\x04"):  # a zip archive: .xlsx workbooks are one
        return "excel"
    # Stata 104-115 binary files: a release byte then a byte-order byte (1 = MSF, 2 = LSF).
    if len(head) > 2 and 104 <= head[0] <= 115 and head[1] in (1, 2) and b"\x00" in head[:200]:
        return "stata"
    if b"\x00" not in head:
        return "csv"
    return None


def _decode(p: Path, raw: bytes, encoding: str | None) -> str:
    enc = encoding or "utf-8-sig"
    try:
        return raw.decode(enc)
    except LookupError:
        raise InputError(f"`encoding` '{encoding}' is not a known text encoding; "
                         "use e.g. utf-8, latin-1 or cp1252") from None
    except UnicodeDecodeError as err:
        raise InputError(
            f"input file '{p}' cannot be decoded as {encoding or 'UTF-8'} (byte 0x{raw[err.start]:02x} "
            f"at position {err.start}); re-save it as UTF-8 or pass `encoding` (e.g. `encoding=latin-1`)"
        ) from None


def _detect_delimiter(text: str) -> str:
    """Pick among , ; tab the delimiter giving the most, and consistent, fields per line."""
    lines = [ln for ln in text[:_SNIFF_BYTES].splitlines() if ln.strip()][:50]
    if len(text) > _SNIFF_BYTES and len(lines) > 1:
        lines = lines[:-1]  # the last sampled line may be cut short
    best, best_score = ",", (False, 1)
    for delim in _DELIMITERS:
        counts = [len(row) for row in csv.reader(lines, delimiter=delim)]
        if not counts or counts[0] < 2:
            continue
        score = (all(c == counts[0] for c in counts), counts[0])
        if score > best_score:
            best, best_score = delim, score
    return best


def _read_csv(p: Path, encoding: str | None) -> pd.DataFrame:
    with open(p, "rb") as fh:
        text = _decode(p, fh.read(), encoding)
    if not text.strip():
        raise InputError(f"input file '{p}' contains only blank space; export the data again")
    delim = _detect_delimiter(text)
    header = next(csv.reader(io.StringIO(text), delimiter=delim), [])
    _check_duplicates(p, [h.strip() for h in header])
    try:
        table = pd.read_csv(io.StringIO(text), sep=delim, skipinitialspace=False)
    except pd.errors.ParserError as err:
        msg = str(err).strip().splitlines()[-1]
        raise InputError(f"input file '{p}' is not a well-formed table ({msg}); "
                         "check the delimiter and quoting of that line") from None
    table.columns = [str(c).strip() for c in table.columns]
    if delim == ";":
        table = _decimal_commas(p, table)
    return table


def _decimal_commas(p: Path, table: pd.DataFrame) -> pd.DataFrame:
    """Read text columns of decimal-comma numbers as numbers; refuse a column that mixes them."""
    out = table.copy()
    for col in table.columns:
        values = table[col]
        if not (pd.api.types.is_object_dtype(values) or pd.api.types.is_string_dtype(values)):
            continue
        present = values.dropna().astype(str)
        present = present[present.str.strip() != ""]
        matches = present.str.match(_DECIMAL_COMMA)
        if not matches.any() or not present.str.contains(",").any():
            continue
        if not matches.all():
            odd = present[~matches].iloc[0]
            raise InputError(
                f"input file '{p}' column {col!r} mixes decimal-comma numbers with other values "
                f"(e.g. {odd!r}), so it is ambiguous; fix that value or save the file with a "
                "decimal point")
        numbers = values.where(values.isna(), values.astype(str).str.strip().str.replace(",", ".", regex=False))
        out[col] = pd.to_numeric(numbers.replace("", np.nan))
    return out


def _read_spss(p: Path, encoding: str | None) -> pd.DataFrame:
    try:
        import pyreadstat
    except ImportError:  # pragma: no cover - a dependency of the package
        raise InputError(f"input file '{p}' is SPSS, which needs the pyreadstat package; "
                         "install it, or save the data as CSV") from None
    try:
        table, _ = pyreadstat.read_sav(str(p), encoding=encoding, apply_value_formats=True)
    except Exception as err:
        raise InputError(f"input file '{p}' could not be read as SPSS .sav ({_first_line(err)}); "
                         "save it again from SPSS or as CSV") from None
    return table


def _read_excel(p: Path, encoding: str | None) -> pd.DataFrame:
    try:
        import openpyxl  # noqa: F401  (the reader pandas uses for .xlsx)
    except ImportError:  # pragma: no cover - a dependency of the package
        raise InputError(f"input file '{p}' is an Excel workbook, which needs the openpyxl "
                         "package; install it, or save the sheet as CSV") from None
    try:
        sheets = pd.read_excel(p, sheet_name=None, engine="openpyxl")
    except Exception as err:
        raise InputError(f"input file '{p}' could not be read as Excel .xlsx ({_first_line(err)}); "
                         "save the sheet as CSV") from None
    filled = {name: sheet for name, sheet in sheets.items() if sheet.shape[1] > 0}
    if len(filled) > 1:
        raise InputError(f"input file '{p}' has {len(filled)} sheets with data "
                         f"({', '.join(map(repr, filled))}); save the sheet to analyse as CSV, "
                         "or keep only that sheet in the workbook")
    table = next(iter(filled.values()), next(iter(sheets.values())))
    table.columns = [str(c).strip() for c in table.columns]
    return table


def _read_parquet(p: Path, encoding: str | None) -> pd.DataFrame:
    import pyarrow.parquet as pq

    try:
        names = pq.read_schema(p).names
        _check_duplicates(p, names)
        return pd.read_parquet(p, engine="pyarrow")
    except InputError:
        raise
    except Exception as err:  # pyarrow raises several types for damaged files
        raise InputError(f"input file '{p}' could not be read as Parquet ({_first_line(err)}); "
                         "export it again") from None


def _read_stata(p: Path, encoding: str | None) -> pd.DataFrame:
    try:
        return pd.read_stata(p)
    except Exception as err:
        raise InputError(f"input file '{p}' could not be read as Stata .dta ({_first_line(err)}); "
                         "save it again from Stata") from None


def _read_xport(p: Path, encoding: str | None) -> pd.DataFrame:
    with open(p, "rb") as fh:
        version8 = fh.read(32).startswith(b"HEADER RECORD*******LIBV8")
    if version8:  # pandas reads XPORT version 5 only
        try:
            import pyreadstat
        except ImportError:
            raise InputError(f"input file '{p}' is SAS transport version 8, which pandas cannot read; "
                             "export it as XPORT version 5, or install pyreadstat") from None
        try:
            return pyreadstat.read_xport(str(p), encoding=encoding)[0]
        except Exception as err:
            raise InputError(f"input file '{p}' could not be read as SAS transport ({_first_line(err)}); "
                             "export it again as XPORT version 5") from None
    try:
        table = pd.read_sas(p, format="xport", encoding=encoding or "utf-8")
    except UnicodeDecodeError:
        raise InputError(f"input file '{p}' has text that is not {encoding or 'UTF-8'}; "
                         "pass `encoding` (e.g. `encoding=latin-1`)") from None
    except LookupError:
        raise InputError(f"`encoding` '{encoding}' is not a known text encoding; "
                         "use e.g. utf-8 or latin-1") from None
    except Exception as err:
        raise InputError(f"input file '{p}' could not be read as SAS transport ({_first_line(err)}); "
                         "export it again as XPORT") from None
    # pandas decodes the IBM float zero (all bytes 0) as +-16**-65 instead of 0; undo that, since
    # 16**-65 is the smallest IBM magnitude and never a real data value.
    for col in table.columns:
        if pd.api.types.is_float_dtype(table[col]):
            v = table[col].to_numpy()
            zero = np.abs(v) == _IBM_ZERO
            if zero.any():
                table[col] = np.where(zero, 0.0, v)
    return table


def _check_duplicates(p: Path, names: list[str]) -> None:
    dup = sorted(n for n, k in Counter(names).items() if k > 1)
    if dup:
        raise InputError(f"input file '{p}' has duplicate column names ({', '.join(map(repr, dup))}); "
                         "rename them so each column name is unique")


def _first_line(err: Exception) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__
