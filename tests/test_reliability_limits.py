"""Size limits of user files and tables: refused with the limit in the message, parsed linearly.

The limits are our own (common practice, see ``noisebench/user_files.py``). Speed figures live
in ``scripts/bench_reliability.py``; these tests check the behaviour and the exact numbers.
"""

from __future__ import annotations

import numpy as np
import pytest

from noisebench.errors import InputError
from noisebench.science.enr import EnrTable, validate_enr_file
from noisebench.science.gain_files import GainTable, load_gain_table
from noisebench.user_files import (
    MAX_PROBLEMS_LISTED,
    MAX_TABLE_BYTES,
    MAX_TABLE_ROWS,
    read_user_text,
)


def _enr_rows(n: int, *, repeat: bool = False) -> str:
    freq = np.full(n, 1e6) if repeat else 1e6 + 1e4 * np.arange(n)
    return "freq_hz,enr_db,u_enr_db\n" + "".join(f"{float(f)!r},15.0,0.1\n" for f in freq)


def test_an_enr_table_above_the_row_limit_is_refused_naming_the_limit(tmp_path):
    path = tmp_path / "huge_enr.csv"
    path.write_text(_enr_rows(MAX_TABLE_ROWS + 1))
    with pytest.raises(InputError, match=f"more than {MAX_TABLE_ROWS} rows"):
        EnrTable.from_csv(path)
    problems = validate_enr_file(path)
    assert len(problems) == 1 and str(MAX_TABLE_ROWS) in problems[0]


def test_an_enr_table_at_the_row_limit_loads(tmp_path):
    path = tmp_path / "big_enr.csv"
    path.write_text(_enr_rows(MAX_TABLE_ROWS))
    table = EnrTable.from_csv(path)
    assert len(table.enr_db) == MAX_TABLE_ROWS
    assert table.at(1e6 + 1e4 * 12345.5).enr_db == pytest.approx(15.0)


def test_a_table_full_of_errors_is_listed_briefly_and_counted(tmp_path):
    # every row repeats the first frequency: 99 999 problems, reported in linear time
    n = 100_000
    path = tmp_path / "repeats.csv"
    path.write_text(_enr_rows(n, repeat=True))
    problems = validate_enr_file(path)
    assert len(problems) == MAX_PROBLEMS_LISTED + 1
    assert problems[0].endswith("line 3, freq_hz: repeats 1 MHz")
    assert problems[-1] == f"... and {n - 1 - MAX_PROBLEMS_LISTED} more problems of the same file"


def test_a_gain_table_above_the_row_limit_is_refused_naming_the_limit(tmp_path):
    path = tmp_path / "huge_gain.csv"
    rows = 1e6 + 1e3 * np.arange(MAX_TABLE_ROWS + 1)
    path.write_text("freq_hz,gain_db\n" + "".join(f"{float(f)!r},20.0\n" for f in rows))
    with pytest.raises(InputError, match=f"more than {MAX_TABLE_ROWS} rows"):
        load_gain_table(path)


def test_a_legit_10001_point_gain_file_loads_exactly(tmp_path):
    freq = np.linspace(10e6, 6e9, 10_001)
    gain = 20.0 + 0.5 * np.sin(freq / 1e9)
    path = tmp_path / "dut_gain.csv"
    path.write_text(
        "freq_hz,gain_db,u_gain_db\n"
        + "".join(f"{float(f)!r},{float(g)!r},0.05\n" for f, g in zip(freq, gain, strict=True))
    )
    table = load_gain_table(path)
    assert len(table.gain_db) == 10_001
    np.testing.assert_array_equal(table.freq_hz, freq)  # repr() reads back bit-exact
    assert table.at(freq[5000]).gain_db == pytest.approx(gain[5000], abs=1e-12)


@pytest.mark.parametrize("reader", [EnrTable.from_csv, load_gain_table])
def test_a_file_above_the_byte_limit_is_refused_unread(tmp_path, reader):
    path = tmp_path / "not_a_table.csv"
    with open(path, "wb") as handle:  # sparse: costs no disc space
        handle.truncate(MAX_TABLE_BYTES + 1)
    with pytest.raises(InputError, match=r"16\.0 MiB limit") as info:
        reader(path)
    assert "not_a_table.csv is 16.0 MiB" in str(info.value)


def test_inline_table_text_has_the_same_byte_limit():
    text = "freq_hz,gain_db\n" + "1e9,20\n" * (MAX_TABLE_BYTES // 7 + 1)
    with pytest.raises(InputError, match="limit"):
        GainTable.from_csv(text)


def test_the_reader_names_the_line_of_bad_utf8(tmp_path):
    path = tmp_path / "plan.toml"
    path.write_bytes(b'name = "a"\nid = "b"\nbad = "\xff\xfe"\n')
    with pytest.raises(InputError, match=r"not UTF-8 text \(line 3, byte 27\)"):
        read_user_text(path, 1000, field="plan.toml", what="plan")


def test_a_plan_above_the_byte_limit_is_refused_by_validate(tmp_path):
    from noisebench.running.plan import validate_plan_file
    from noisebench.user_files import MAX_PLAN_BYTES

    path = tmp_path / "plan.toml"
    path.write_text('method = "y_factor"\n' + "# padding\n" * (MAX_PLAN_BYTES // 10 + 1))
    (problem,) = validate_plan_file(path)
    assert "above the 1.0 MiB limit for a plan" in problem


def test_a_unit_list_that_is_not_text_or_too_big_is_refused(tmp_path):
    from noisebench.frontends.units import units_from_file
    from noisebench.user_files import MAX_UNIT_LIST_BYTES

    path = tmp_path / "units.txt"
    path.write_bytes(b"SN-1\nSN-2\n\xff\xfeSN-3\n")
    with pytest.raises(InputError, match=r"units: is not UTF-8 text \(line 3"):
        units_from_file(path)
    with open(path, "wb") as handle:
        handle.truncate(MAX_UNIT_LIST_BYTES + 1)
    with pytest.raises(InputError, match=r"16\.0 MiB limit for a unit list"):
        units_from_file(path)
    path.write_text("\ufeffSN-1\nSN-2\n", encoding="utf-8")  # a byte-order mark is fine
    assert [u.serial for u in units_from_file(path)] == ["SN-1", "SN-2"]


def test_a_touchstone_file_above_the_row_limit_is_refused(tmp_path, monkeypatch):
    pytest.importorskip("skrf")
    import noisebench.user_files as limits

    monkeypatch.setattr(limits, "MAX_TABLE_ROWS", 3)  # the same check, on a small file
    path = tmp_path / "dut.s2p"
    rows = "".join(f"{f} 0.1 0 10 0 0.01 0 0.2 0\n" for f in (1e9, 2e9, 3e9, 4e9))
    path.write_text("# HZ S MA R 50\n" + rows, encoding="utf-8")
    with pytest.raises(InputError, match="more than 3 rows, the limit for a Touchstone gain"):
        load_gain_table(path)
    monkeypatch.setattr(limits, "MAX_TABLE_ROWS", 4)
    assert len(load_gain_table(path).gain_db) == 4
