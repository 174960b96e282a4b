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


# ------------------------------------------- image-rejection tables: the same reader -----------


def _rejection(tmp_path, text):
    from noisebench.running.conversion import ConversionSection, ImageRejection

    path = tmp_path / "rejection.csv"
    path.write_text(text, encoding="utf-8")
    section = ConversionSection(
        mode="fixed_lo", lo_hz=1.6e9, image_rejection_db=path.name, lo={"source": "external"}
    )
    return ImageRejection(section, lambda name: tmp_path / name)


def test_image_rejection_table_takes_the_common_layout(tmp_path):
    # metadata lines, a byte-order mark and a scaled frequency column, as every table accepts
    rej = _rejection(
        tmp_path,
        "\ufeff# description: two-tone test of unit 7\nfreq_ghz,image_rejection_db\n"
        "2.0,20.0\n2.2,24.0\n",
    )
    assert rej.at(2.1e9) == pytest.approx(22.0, abs=1e-12)  # linear in dB between rows
    assert rej.description == "table rejection.csv"


@pytest.mark.parametrize(
    "body,where,what",
    [
        ("freq_hz,image_rejection_db\n2e9,20\n2e9,21\n", "line 3", "ascending"),
        ("freq_hz,image_rejection_db\n2e9,20\n2.1e9,abc\n", "line 3", "not a number"),
        ("freq_hz,image_rejection_db\n2e9,20\n2.1e9,250\n", "line 3", "image_rejection_db"),
        ("freq_hz;image_rejection_db\n2e9;20\n", "line 1", "separated"),
        ("freq_hz,gain_db\n2e9,20\n", "line 1", "image_rejection_db"),
    ],
)
def test_image_rejection_table_problems_name_their_line(tmp_path, body, where, what):
    with pytest.raises(InputError) as err:
        _rejection(tmp_path, body)
    assert f"rejection.csv {where}" in str(err.value) and what in str(err.value)


def test_image_rejection_table_stops_at_the_row_limit(tmp_path, monkeypatch):
    import noisebench.user_files as user_files

    monkeypatch.setattr(user_files, "MAX_TABLE_ROWS", 3)
    rows = "".join(f"{2e9 + i * 1e6:.6g},20\n" for i in range(5))
    with pytest.raises(InputError) as err:
        _rejection(tmp_path, "freq_hz,image_rejection_db\n" + rows)
    assert "line 5" in str(err.value)
