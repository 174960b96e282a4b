"""Reading the small CSV tables users write: clear errors that name the file and the fix."""

from __future__ import annotations

import pytest

from noisebench.errors import InputError
from noisebench.science.enr import EnrTable
from noisebench.science.gain_files import load_gain_table
from noisebench.science.tables import read_table_text


def test_text_with_a_line_break_is_the_table_itself():
    assert read_table_text(
        "freq_hz,enr_db\n1e9,15\n", None, what="ENR table file", text_label="ENR text"
    ) == ("freq_hz,enr_db\n1e9,15\n", "ENR text")


def test_missing_file_folder_and_binary_are_named(tmp_path):
    with pytest.raises(InputError, match=r"enr\.csv: ENR table file not found"):
        EnrTable.from_csv(tmp_path / "enr.csv")
    with pytest.raises(InputError, match="is a folder"):
        load_gain_table(tmp_path)
    bad = tmp_path / "gain.csv"
    bad.write_bytes(b"freq_hz,gain_db\n\xff\xfe1e9,20\n")
    with pytest.raises(InputError, match="gain.csv: is not UTF-8 text"):
        load_gain_table(bad)
