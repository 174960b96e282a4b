"""noisebench.science.enr: our ENR CSV format, strict validation with line/field, interpolation."""

from __future__ import annotations

import math
from datetime import date

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from noisebench.errors import InputError
from noisebench.science.enr import EnrMetadata, EnrTable, EnrValue, validate_enr_file

GOOD = """\
# serial: NS-0042
# description: invented demo source
# calibration_temperature_k: 296.5
# nominal_drive_v: 28
# calibrated: 2026-03-01
# bench_slot: 3
freq_hz,enr_db,u_enr_db
10e6,15.41,0.12
1e9,15.20,0.10
6e9,14.83,0.11
"""


def test_parse_good_table_with_metadata():
    t = EnrTable.from_csv(GOOD)
    assert t.freq_hz == [10e6, 1e9, 6e9]
    assert t.enr_db == [15.41, 15.20, 14.83]
    assert t.u_enr_db == [0.12, 0.10, 0.11]
    m = t.metadata
    assert m.serial == "NS-0042" and m.description == "invented demo source"
    assert m.calibration_temperature_k == 296.5 and m.nominal_drive_v == 28.0
    assert m.calibrated == date(2026, 3, 1)
    assert m.extra == {"bench_slot": "3"}
    assert t.range_hz == (10e6, 6e9) and not t.is_flat


@pytest.mark.parametrize("column, scale", [("freq_khz", 1e3), ("freq_mhz", 1e6), ("freq_ghz", 1e9)])
def test_frequency_units_in_the_header(column, scale):
    freqs = [10e6, 1e9, 6e9]
    rows = "\n".join(f"{f / scale!r},{e}" for f, e in zip(freqs, [15.4, 15.2, 14.8], strict=True))
    t = EnrTable.from_csv(f"{column},enr_db\n{rows}\n")
    np.testing.assert_allclose(t.freq_hz, freqs, rtol=1e-15)


def test_columns_in_any_order_and_crlf_and_blank_lines():
    t = EnrTable.from_csv("u_enr_db , ENR_DB, freq_mhz\r\n\r\n0.1,15.0,1000\r\n0.2,14.0,2000\r\n")
    assert t.freq_hz == [1e9, 2e9] and t.enr_db == [15.0, 14.0] and t.u_enr_db == [0.1, 0.2]


def test_expanded_uncertainty_column_is_divided_by_its_coverage_factor():
    t = EnrTable.from_csv("# uncertainty_k: 2\nfreq_hz,enr_db,u_enr_db\n1e9,15,0.2\n2e9,15,0.3\n")
    assert t.u_enr_db == pytest.approx([0.1, 0.15])
    assert "uncertainty_k" not in t.metadata.extra
    # the written table holds standard uncertainties and no coverage factor
    assert EnrTable.from_csv(t.to_csv()).u_enr_db == pytest.approx([0.1, 0.15])


# --------------------------------------------------------------------------- validation


@pytest.mark.parametrize(
    "text, expected",
    [
        (
            "freq_hz,enr_db\n1e9,15\n3e9,15\n2e9,15\n",
            "enr.csv line 4, freq_hz: not sorted ascending (follows 3 GHz)",
        ),
        ("freq_hz,enr_db\n1e9,15\n1e9,15\n", "enr.csv line 3, freq_hz: repeats 1 GHz"),
        ("freq_hz,enr_db\n1e9,nan\n", "enr.csv line 2, enr_db: must be finite (got 'nan')"),
        ("freq_hz,enr_db\n1e9,abc\n", "enr.csv line 2, enr_db: not a number: 'abc'"),
        ("freq_hz,enr_db\n-1e9,15\n", "enr.csv line 2, freq_hz: must be finite and > 0"),
        ("freq_hz,enr_db\n2e12,15\n", "enr.csv line 2, freq_hz: 2 THz is above 1 THz"),
        (
            "freq_hz,enr_db\n1e9,46\n",
            "enr.csv line 2, enr_db: 46 dB is outside the plausible -10..45 dB",
        ),
        (
            "freq_hz,enr_db,u_enr_db\n1e9,15,-0.1\n",
            "enr.csv line 2, u_enr_db: must be finite and >= 0",
        ),
        ("freq_hz,enr_db\n1e9,15,0.1\n", "enr.csv line 2: has 3 fields, the header has 2"),
        ("freq_hz,enr\n1e9,15\n", "enr.csv line 1, header: unknown column 'enr'"),
        ("freq_hz,u_enr_db\n1e9,0.1\n", "enr.csv line 1, header: has no enr_db column"),
        (
            "freq_hz,freq_mhz,enr_db\n1e9,1000,15\n",
            "enr.csv line 1, header: has more than one frequency column",
        ),
        ("# serial: x\n", "enr.csv: has no header line"),
        ("freq_hz,enr_db\n", "enr.csv line 1: the table has no data rows"),
        (
            "freq_hz,enr_db\n# serial: x\n1e9,15\n",
            "enr.csv line 2, serial: metadata must come before the header",
        ),
        (
            "# serial: a\n# serial: b\nfreq_hz,enr_db\n1e9,15\n",
            "enr.csv line 2, serial: repeats metadata from line 1",
        ),
        ("# calibrated: last week\nfreq_hz,enr_db\n1e9,15\n", "enr.csv line 1, calibrated:"),
        ("# nominal_drive_v: -28\nfreq_hz,enr_db\n1e9,15\n", "enr.csv line 1, nominal_drive_v:"),
        (
            "# uncertainty_k: 0.5\nfreq_hz,enr_db\n1e9,15\n",
            "enr.csv line 1, uncertainty_k: must be a number >= 1",
        ),
        (
            "freq_hz,enr_db\n1,15\n2,15\n26.5,14\n",
            "enr.csv line 2, freq_hz: every frequency is below 1 MHz (highest 26.5 Hz): "
            "the numbers look like MHz or GHz",
        ),
        ("enr_db\n15\n14\n", "enr.csv, freq_hz: is missing"),
    ],
)
def test_each_problem_names_line_and_field(text, expected):
    with pytest.raises(InputError) as info:
        EnrTable.from_csv(text, name="enr.csv")
    assert str(info.value).startswith(expected), str(info.value)


def test_validate_lists_every_problem_in_line_order(tmp_path):
    path = tmp_path / "enr.csv"
    path.write_text(
        "# calibrated: soon\nfreq_hz,enr_db\n1e9,15\n2e9,abc\n2e9,14\n1.5e9,60\n3e9\n",
        encoding="utf-8",
    )
    problems = validate_enr_file(path)
    assert problems == [
        "enr.csv line 1, calibrated: Input should be a valid date or datetime, input is too short",
        "enr.csv line 4, enr_db: not a number: 'abc'",
        "enr.csv line 5, freq_hz: repeats 2 GHz",
        "enr.csv line 6, freq_hz: not sorted ascending (follows 2 GHz)",
        "enr.csv line 6, enr_db: 60 dB is outside the plausible -10..45 dB (a linear ENR or a "
        "wrong column?)",
        "enr.csv line 7: has 1 fields, the header has 2",
    ]
    with pytest.raises(InputError, match=r"\(\+5 more problems\)"):
        EnrTable.from_csv(path)


def test_validate_good_and_missing_files(tmp_path):
    good = tmp_path / "good.csv"
    good.write_text(GOOD, encoding="utf-8")
    assert validate_enr_file(good) == []
    assert EnrTable.from_csv(str(good)) == EnrTable.from_csv(GOOD)
    missing = validate_enr_file(tmp_path / "nope.csv")
    assert len(missing) == 1 and "not found" in missing[0]
    with pytest.raises(InputError, match="not found"):
        EnrTable.from_csv(tmp_path / "nope.csv")


def test_direct_construction_raises_input_error_not_a_pydantic_dump():
    with pytest.raises(InputError, match=r"freq_hz\[1\]: not sorted ascending"):
        EnrTable(freq_hz=[2e9, 1e9], enr_db=[15.0, 15.0])
    with pytest.raises(InputError, match="enr_db: the table has no rows"):
        EnrTable(freq_hz=[], enr_db=[])
    with pytest.raises(InputError, match="u_enr_db"):
        EnrTable(freq_hz=[1e9], enr_db=[15.0], u_enr_db=[0.1, 0.2])


# --------------------------------------------------------------------------- interpolation


def test_interpolation_is_linear_in_db_versus_linear_frequency():
    t = EnrTable.from_csv("freq_hz,enr_db,u_enr_db\n1e9,15.0,0.10\n3e9,13.0,0.20\n")
    v = t.at(1.5e9)
    assert isinstance(v, EnrValue) and v.extrapolated is False
    # common practice: straight line between the dB values (not between linear ENRs)
    assert v.enr_db == pytest.approx(15.0 + (13.0 - 15.0) * 0.5e9 / 2e9, abs=1e-12)
    linear_mean = 10 * math.log10(10**1.5 + (10**1.3 - 10**1.5) * 0.25)
    assert abs(v.enr_db - linear_mean) > 0.01  # the two conventions really differ here
    assert v.u_enr_db == pytest.approx(0.125, abs=1e-12)
    assert t.at(1e9).enr_db == 15.0 and t.at(3e9).enr_db == 13.0  # nodes are exact


def test_lookup_is_vectorized():
    t = EnrTable.from_csv(GOOD)
    freqs = np.array([[10e6, 1e9], [3.5e9, 6e9]])
    v = t.at(freqs)
    assert v.enr_db.shape == (2, 2) and v.u_enr_db.shape == (2, 2)
    np.testing.assert_allclose(v.enr_db, np.interp(freqs, t.freq_hz, t.enr_db), rtol=1e-15)
    assert v.extrapolated.dtype == bool and not v.extrapolated.any()


def test_outside_the_range_refused_or_clamped_and_flagged():
    t = EnrTable.from_csv(GOOD)
    with pytest.raises(
        InputError,
        match=r"freq_hz: 7 GHz is outside the ENR table's range "
        r"10 MHz to 6 GHz",
    ):
        t.at(7e9)
    with pytest.raises(InputError, match="outside"):
        t.at(np.array([1e9, 5e6]))
    v = t.at(np.array([5e6, 1e9, 7e9]), extrapolate="clamp")
    np.testing.assert_allclose(v.enr_db, [15.41, 15.20, 14.83])
    assert v.extrapolated.tolist() == [True, False, True]
    # a frequency a rounding error past the edge counts as inside
    assert t.at(6e9 * (1 + 1e-12)).extrapolated is False
    with pytest.raises(InputError, match="extrapolate"):
        t.at(1e9, extrapolate="linear")
    with pytest.raises(InputError, match="freq_hz"):
        t.at(float("nan"))


def test_table_without_uncertainty_gives_none():
    t = EnrTable.from_csv("freq_hz,enr_db\n1e9,15\n2e9,14\n")
    assert t.at(1.5e9).u_enr_db is None and t.at(np.array([1.5e9])).u_enr_db is None


def test_single_frequency_table_is_a_spot_value():
    t = EnrTable.from_csv("freq_hz,enr_db\n1e9,15\n")
    assert t.at(1e9).enr_db == 15.0
    with pytest.raises(InputError, match="outside"):
        t.at(1.1e9)


def test_constant_table():
    t = EnrTable.constant(15.2, u_enr_db=0.1, serial="flat-1")
    assert t.is_flat and t.range_hz is None
    v = t.at(np.array([1e6, 1e9, 40e9]))
    np.testing.assert_array_equal(v.enr_db, 15.2)
    np.testing.assert_array_equal(v.u_enr_db, 0.1)
    assert not v.extrapolated.any()
    text = t.to_csv()
    assert text == "# serial: flat-1\nenr_db,u_enr_db\n15.2,0.1\n"
    assert EnrTable.from_csv(text) == t


# --------------------------------------------------------------------------- round trips


def test_csv_and_json_round_trip(tmp_path):
    t = EnrTable.from_csv(GOOD)
    path = tmp_path / "out.csv"
    text = t.to_csv(path)
    assert path.read_text(encoding="utf-8") == text
    assert EnrTable.from_csv(path) == t
    assert EnrTable.model_validate_json(t.model_dump_json()) == t


@given(
    st.lists(
        st.tuples(
            st.floats(min_value=1e6, max_value=1e11),  # an ENR table starts at 1 MHz or above
            st.floats(min_value=-10, max_value=45),
            st.floats(min_value=0, max_value=2),
        ),
        min_size=1,
        max_size=30,
        unique_by=lambda r: r[0],
    ),
    st.sampled_from(["", "NS-1", "a b: c"]),
)
def test_round_trip_any_valid_table(rows, serial):
    rows = sorted(rows)
    t = EnrTable(
        freq_hz=[r[0] for r in rows],
        enr_db=[r[1] for r in rows],
        u_enr_db=[r[2] for r in rows],
        metadata=EnrMetadata(serial=serial or None),
    )
    back = EnrTable.from_csv(t.to_csv())
    assert back == t  # repr() of floats round-trips exactly


@given(
    st.lists(
        st.tuples(st.floats(min_value=1e6, max_value=1e11), st.floats(min_value=-10, max_value=45)),
        min_size=2,
        max_size=20,
        unique_by=lambda r: r[0],
    ),
    st.floats(min_value=0.0, max_value=1.0),
)
def test_interpolated_value_lies_on_the_segment_between_its_nodes(rows, where):
    rows = sorted(rows)
    freqs = [r[0] for r in rows]
    enrs = [r[1] for r in rows]
    t = EnrTable(freq_hz=freqs, enr_db=enrs)
    f = freqs[0] + where * (freqs[-1] - freqs[0])
    i = min(int(np.searchsorted(freqs, f, side="right")) - 1, len(freqs) - 2)
    i = max(i, 0)
    lo, hi = sorted((enrs[i], enrs[i + 1]))
    v = t.at(f)
    assert lo - 1e-9 <= v.enr_db <= hi + 1e-9 and v.extrapolated is False
    for fn, en in zip(freqs, enrs, strict=True):  # every node is returned exactly
        assert t.at(fn).enr_db == pytest.approx(en, abs=1e-12)
