"""Safe output: atomic writes, refusal of unsafe folders, deterministic JSON."""

import json
import math

import numpy as np
import pytest

from stratagap import InputError
from stratagap.render.files import DEMO_MARKER, prepare_folder, write_atomic
from stratagap.result import to_json


def test_refuses_non_empty_folder_without_overwrite(tmp_path):
    (tmp_path / "old.txt").write_text("x")
    with pytest.raises(InputError, match="`overwrite`"):
        prepare_folder(tmp_path)
    assert prepare_folder(tmp_path, overwrite=True) == tmp_path.resolve()


def test_refuses_output_equal_to_or_inside_input(tmp_path):
    data = tmp_path / "data.csv"
    data.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match="`out`"):
        prepare_folder(data, inputs=[data])
    with pytest.raises(InputError, match="`out`"):
        prepare_folder(data / "sub", inputs=[data])
    assert data.read_text() == "a,b\n1,2\n"


def test_demo_may_reuse_its_own_folder_only(tmp_path):
    out = tmp_path / "demo"
    prepare_folder(out, demo=True)
    (out / "results.json").write_text("{}")
    assert (out / DEMO_MARKER).is_file()
    prepare_folder(out, demo=True)  # its own earlier output: allowed
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "thesis.docx").write_text("precious")
    with pytest.raises(InputError, match="not empty"):
        prepare_folder(foreign, demo=True)


def test_atomic_write_leaves_no_temporary_files(tmp_path):
    write_atomic(tmp_path / "a.json", "{}\n")
    write_atomic(tmp_path / "a.json", "{\"b\": 1}\n")
    assert [p.name for p in tmp_path.iterdir()] == ["a.json"]
    assert json.loads((tmp_path / "a.json").read_text()) == {"b": 1}


def test_json_is_deterministic_and_has_no_nan():
    data = {"x": np.float64(1.5), "n": np.int64(3), "nan": math.nan, "arr": np.arange(3),
            "flag": np.bool_(True), "t": (1, 2)}
    text = to_json(data)
    assert text == to_json(data)
    assert json.loads(text) == {"x": 1.5, "n": 3, "nan": None, "arr": [0, 1, 2], "flag": True,
                                "t": [1, 2]}
