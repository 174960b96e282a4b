"""Every frequency a person reads goes through ``noisebench.units`` (engineering units:
``2 GHz``, ``10 MHz to 18 GHz``), never a bare ``:.6g`` / ``%g`` number before ``Hz``
(``2e+09 Hz``, ``3.3e+09 Hz not measured``).

Prefixes (k, M, G) and a space between the number and the unit follow BIPM, *The
International System of Units*, 9th ed., 2019 (prefix table and the rule for writing a
quantity; section numbers not given, from memory: §3 and §5.4.3)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from noisebench.running.groups import PointGroup
from noisebench.units import format_frequency

PACKAGE = Path(__file__).resolve().parents[1] / "noisebench"

#: a formatted number right before a frequency unit: f-string fields with a format spec or a
#: conversion (``{f:.6g} Hz``, ``{f / 1e9:.3f} GHz``, ``{f!r} Hz``) and %-style logging
#: (``%.6g Hz``, ``%s Hz``)
NUMBER_BEFORE_UNIT = re.compile(
    r"(\{[^{}]*(?::[^{}]*|![rs])\}\]?|%[-+ #0-9.]*[gefdis])\s?[kMGT]?Hz\b"
)

#: a frequency-named value (``*_hz``, not ``*_per_hz``) formatted as a bare number anywhere in
#: a message (``between {start_hz:g} and``, ``{lo_hz:.9g}..{hi_hz:.9g}``), with or without
#: ``Hz`` after it; a ``!r`` echo of what the user gave is not a formatted frequency
BARE_FREQUENCY_FIELD = re.compile(r"\{[^{}]*(?<!per)_hz\b[^{}!:]*:[-+ #0-9.,_]*[gef]\}")

#: places where the text is not read as prose, with the reason
ALLOWED = {
    ("sims/samples.py", "{center / 1e6:.6f}MHz"): "a recording's file name, fixed width",
    ("running/plan.py", "{self.span_hz / self.rbw_hz:.3g}"): "a count of RBW cells, no unit",
    ("sampled/analyzer.py", "{block.sample_rate_hz:g}"): "a sample rate, samples/s",
}


def offending_lines(root: Path = PACKAGE) -> list[str]:
    found = []
    for path in sorted(root.rglob("*.py")):
        rel = path.relative_to(root).as_posix()
        if rel == "units.py":
            continue
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            matches = [*NUMBER_BEFORE_UNIT.finditer(line), *BARE_FREQUENCY_FIELD.finditer(line)]
            for match in matches:
                if (rel, match.group(0)) not in ALLOWED:
                    found.append(f"{rel}:{number}: {line.strip()}")
    return found


def test_no_bare_number_before_a_frequency_unit_in_the_package():
    assert offending_lines() == [], "use noisebench.units.format_frequency"


@pytest.mark.parametrize(
    "line",
    [
        'f"{freq_hz:.6g} Hz is outside"',
        'f"at {f / 1e9:.3f} GHz"',
        'f"{point.freq_hz!r} Hz is already"',
        '"point %.6g Hz stored"',
        'f"range [{low:.6g}, {high:.6g}] Hz"',
        'f"{span:g}Hz"',
        'f"100000 points between {self.start_hz:g} and "',  # the plan's step message had it
        'f"no recording covers {lo_hz:.9g}..{hi_hz:.9g} "',
    ],
)
def test_the_scan_sees_each_old_form(line):
    assert NUMBER_BEFORE_UNIT.search(line) or BARE_FREQUENCY_FIELD.search(line)


def test_the_scan_leaves_densities_and_echoes_of_bad_input_alone():
    for line in ('f"({floor.density_dbm_per_hz:.2f} dBm/Hz)"', 'f"(got {freq_hz!r})"'):
        assert not NUMBER_BEFORE_UNIT.search(line) and not BARE_FREQUENCY_FIELD.search(line)


def test_group_descriptions_in_skip_messages_use_engineering_units():
    # the demo's log said "3.3e+09 Hz not measured (calibration): ..."
    from dataclasses import replace

    from noisebench.running.plan import AcquisitionPolicy

    group = PointGroup(0, (3.3e9,), AcquisitionPolicy(), 3.3e9, 10e6, 10e6, 201)
    assert group.describe() == "3.3 GHz"
    assert replace(group, freqs_hz=(1e9, 2.05e9)).describe() == "1 GHz to 2.05 GHz"
    converter = replace(group, freqs_hz=(4e8,), lo_hz=2.6e9, rf_hz=(3e9,))
    assert converter.describe() == "RF 3 GHz (IF 400 MHz, LO 2.6 GHz)"
    assert format_frequency(1.000000001e9, 10) == "1.000000001 GHz"  # digits kept on request
