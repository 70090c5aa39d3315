"""Readers for SPSS (.sav), Excel (.xlsx) and semicolon files with decimal commas.

Round trips: a table written by an independent writer (pyreadstat's ``write_sav``, pandas'
``to_excel`` through openpyxl, a hand-written text file) reads back equal, values and types.
"""

import numpy as np
import pandas as pd
import pytest

from stratagap.data import read_table
from stratagap.errors import InputError


@pytest.fixture
def table():
    return pd.DataFrame({"age": [31.5, 42.0, 55.25, 60.0], "smoker": [0, 1, 1, 0],
                         "shift": ["days", "nights", "nights", "days"]})


def test_spss_round_trip_and_value_labels(tmp_path, table):
    import pyreadstat

    path = tmp_path / "staff.sav"
    coded = table.assign(shift=(table["shift"] == "nights").astype(float))
    pyreadstat.write_sav(coded, str(path), variable_value_labels={"shift": {0.0: "days", 1.0: "nights"}})
    got = read_table(path)
    assert got["age"].tolist() == table["age"].tolist()
    assert got["smoker"].tolist() == table["smoker"].tolist()
    # value labels are applied, so the exposure reads as the words the study used
    assert got["shift"].astype(str).tolist() == table["shift"].tolist()


def test_spss_content_checked(tmp_path):
    fake = tmp_path / "fake.sav"
    fake.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match=r"named \.sav but its content is CSV/text"):
        read_table(fake)


def test_excel_round_trip(tmp_path, table):
    path = tmp_path / "staff.xlsx"
    table.to_excel(path, index=False, engine="openpyxl")
    got = read_table(path)
    pd.testing.assert_frame_equal(got, table, check_dtype=False)
    assert got["age"].dtype.kind == "f" and got["smoker"].dtype.kind == "i"


def test_excel_with_two_filled_sheets_is_refused(tmp_path, table):
    path = tmp_path / "book.xlsx"
    with pd.ExcelWriter(path, engine="openpyxl") as writer:
        table.to_excel(writer, sheet_name="staff", index=False)
        table.to_excel(writer, sheet_name="copy", index=False)
    with pytest.raises(InputError, match=r"2 sheets with data \('staff', 'copy'\).*save the sheet"):
        read_table(path)


@pytest.mark.parametrize("suffix, advice", [(".xls", "save it as CSV"),
                                            (".sas7bdat", "export it as SAS transport"),
                                            (".ods", "save the sheet as CSV")])
def test_known_but_unread_formats_say_what_to_do(tmp_path, suffix, advice):
    path = tmp_path / f"data{suffix}"
    path.write_bytes(b"\x00\x01binary")
    with pytest.raises(InputError, match=advice) as info:
        read_table(path)
    assert "rename" not in str(info.value)


def test_semicolon_file_with_decimal_commas(tmp_path):
    path = tmp_path / "euro.csv"
    path.write_text("id;bmi;sbp;group\n1;23,5;120;a\n2;31,25;;b\n3;-0,5;131,5;a\n4;1,5e2;118;b\n",
                    encoding="utf-8")
    got = read_table(path)
    assert got["bmi"].tolist() == [23.5, 31.25, -0.5, 150.0]
    assert got["sbp"].iloc[0] == 120.0 and np.isnan(got["sbp"].iloc[1]) and got["sbp"].iloc[2] == 131.5
    assert got["group"].tolist() == ["a", "b", "a", "b"]  # text stays text
    assert got["id"].tolist() == [1, 2, 3, 4]


def test_semicolon_file_mixing_decimal_marks_is_refused(tmp_path):
    path = tmp_path / "mixed.csv"
    path.write_text("id;bmi\n1;23,5\n2;24.5\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"column 'bmi' mixes decimal-comma numbers.*'24.5'"):
        read_table(path)


def test_comma_file_keeps_quoted_commas_as_text(tmp_path):
    path = tmp_path / "names.csv"
    path.write_text('id,name\n1,"3,5"\n2,"x,y"\n', encoding="utf-8")
    got = read_table(path)  # a comma-delimited file: no decimal-comma reading
    assert got["name"].tolist() == ["3,5", "x,y"]
