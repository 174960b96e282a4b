"""Plausible ranges of every physical setting: one table, one checker, used everywhere.

Each :class:`PhysicalRange` says what no bench can have (``refuse_below``/``refuse_above``:
an :class:`~noisebench.errors.InputError` that names the field, the likely slip and the fix)
and what is legal but unusual (``usual_low``/``usual_high``: one warning per field and value
per process). Plans (pydantic validators in ``noisebench.running.plan``), table readers
(``enr.py``, ``gain_files.py``, ``tables.py``) and the methods call :func:`check_range` with a
key of :data:`RANGES`, so a new setting gets its range by adding one line here.

Legitimate special cases stay possible by stating them (``on_purpose=True``): a cold load in
liquid nitrogen (77 K) for the Y-factor method is refused as a typo unless the plan says
``cryogenic = true``. The ``source`` of each range is printed with the message; "common
practice" marks rules of thumb, "from memory" values recalled without a written source.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

from noisebench.errors import InputError
from noisebench.units import format_frequency, format_frequency_range

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class PhysicalRange:
    """Where a quantity is impossible (refused) and where it is unusual (warned once).

    ``slip_hint(value)`` returns the likely mistake for a value outside the range (e.g. degrees
    Celsius given for kelvin), or None. ``purpose_hint`` says how to state an unusual but
    legitimate value on purpose (None: it cannot be overridden).
    """

    unit: str
    refuse_below: float | None
    refuse_above: float | None
    usual_low: float | None
    usual_high: float | None
    source: str
    low_hint: str | None = None
    high_hint: str | None = None
    purpose_hint: str | None = None
    purpose_below: float | None = None  # with on_purpose, refuse only below this


def _value(x: float, unit: str) -> str:
    """A value with its unit; frequencies in engineering units (``noisebench.units``)."""
    return format_frequency(x) if unit == "Hz" else f"{x:g} {unit}"


def _span(low: float | None, high: float | None, unit: str) -> str:
    if low is not None and low == high:
        return _value(low, unit)
    if unit == "Hz" and low is not None and high is not None:
        return format_frequency_range(low, high)
    lo = "-inf" if low is None else f"{low:g}"
    hi = "inf" if high is None else f"{high:g}"
    return f"{lo}..{hi} {unit}"


TEMPERATURE_HINT_C = "a value this low looks like degrees Celsius: give kelvin (K = degC + 273.15)"

RANGES: dict[str, PhysicalRange] = {
    # physical temperature of a termination, noise source (cold), cable or loss
    "physical_temperature_k": PhysicalRange(
        unit="K",
        refuse_below=200.0,
        refuse_above=500.0,
        usual_low=273.0,
        usual_high=330.0,
        source="common practice: bench terminations, sources and cables sit at room temperature "
        "(0-57 degC); 77 K (liquid nitrogen) or 4.2 K (liquid helium) only for a cryogenic load",
        low_hint=TEMPERATURE_HINT_C,
        high_hint="hotter than any bench termination; check the unit (K)",
        purpose_hint="for a cryogenic cold load say cryogenic = true in [corrections]",
        purpose_below=1.0,
    ),
    # the reference temperature T0 itself (the standard fixes it at 290 K)
    "reference_temperature_k": PhysicalRange(
        unit="K",
        refuse_below=200.0,
        refuse_above=400.0,
        usual_low=290.0,
        usual_high=290.0,
        source="the IRE/IEEE definition of noise figure fixes T0 = 290 K (from memory)",
        low_hint=TEMPERATURE_HINT_C,
    ),
    "frequency_hz": PhysicalRange(
        unit="Hz",
        refuse_below=9e3,
        refuse_above=1.1e12,
        usual_low=1e6,
        usual_high=110e9,
        source="common practice: RF spectrum analyzers start at 9 kHz, noise sources at about "
        "10 MHz; noisebench measures from 9 kHz to 1.1 THz",
        low_hint="looks like MHz or GHz given where Hz is asked (2 GHz is 2e9)",
        high_hint="looks like a value in mHz, or an extra factor 1e3/1e6",
    ),
    "rbw_hz": PhysicalRange(
        unit="Hz",
        refuse_below=0.1,
        refuse_above=100e6,
        usual_low=1e3,
        usual_high=50e6,
        source="common practice: analyzer RBW filters span about 1 Hz to 50 MHz; noise figure "
        "uses 100 kHz-4 MHz",
        low_hint="looks like kHz or MHz given where Hz is asked (1 MHz is 1e6)",
    ),
    "analyzer_max_input_dbm": PhysicalRange(
        unit="dBm",
        refuse_below=-30.0,
        refuse_above=50.0,
        usual_low=10.0,
        usual_high=40.0,
        source="common practice: spectrum analyzers are rated for +20 to +30 dBm continuous "
        "input (see the instrument's manual)",
        low_hint="no analyzer input is damaged at this level; give the rated maximum input",
    ),
    "analyzer_compression_dbm": PhysicalRange(
        unit="dBm",
        refuse_below=-60.0,
        refuse_above=40.0,
        usual_low=-20.0,
        usual_high=20.0,
        source="common practice: first-mixer 1 dB compression of analyzers is about -10 to "
        "+10 dBm at 0 dB attenuation",
    ),
    "generator_level_dbm": PhysicalRange(
        unit="dBm",
        refuse_below=-150.0,
        refuse_above=40.0,
        usual_low=-130.0,
        usual_high=25.0,
        source="common practice: signal generators cover about -130 to +25 dBm",
    ),
    "dut_gain_db": PhysicalRange(
        unit="dB",
        refuse_below=-60.0,
        refuse_above=100.0,
        usual_low=0.5,
        usual_high=70.0,
        source="common practice: amplifiers 5-60 dB; attenuators (negative gain) are legal but "
        "their noise figure rests on the loss, not on amplified noise",
        low_hint="a gain this low is an attenuator or a dead DUT",
    ),
    "limit_gain_db": PhysicalRange(
        unit="dB",
        refuse_below=-100.0,
        refuse_above=100.0,
        usual_low=0.5,
        usual_high=70.0,
        source="common practice: gain limits of amplifiers; a limit <= 0 dB accepts an "
        "unpowered amplifier",
        low_hint="a gain limit <= 0 dB passes an unpowered amplifier; meant for attenuators only",
    ),
    "limit_nf_db": PhysicalRange(
        unit="dB",
        refuse_below=0.0,
        refuse_above=60.0,
        usual_low=0.1,
        usual_high=30.0,
        source="definition: F >= 1 (NF >= 0 dB) for any passive source at T0",
    ),
    "nf_db": PhysicalRange(
        unit="dB",
        refuse_below=0.0,
        refuse_above=60.0,
        usual_low=0.1,
        usual_high=30.0,
        source="definition: F >= 1 (NF >= 0 dB); analyzers have NF 5-30 dB (common practice)",
    ),
    "dut_p1db_dbm": PhysicalRange(
        unit="dBm",
        refuse_below=-60.0,
        refuse_above=70.0,
        usual_low=0.0,
        usual_high=50.0,
        source="common practice: output P1dB of LNAs about 0 to +20 dBm, power amplifiers to "
        "+50 dBm",
    ),
    "enr_db": PhysicalRange(
        unit="dB",
        refuse_below=-10.0,
        refuse_above=45.0,
        usual_low=3.0,
        usual_high=35.0,
        source="common practice: solid-state noise sources 5-35 dB ENR",
    ),
    "drive_v": PhysicalRange(
        unit="V",
        refuse_below=0.0,
        refuse_above=60.0,
        usual_low=5.0,
        usual_high=30.0,
        source="common practice: noise sources are driven with a nominal +28 V (some +15 V)",
    ),
    # a trace point as an analyzer displays it (dBm per RBW or dBm/Hz)
    "trace_level_dbm": PhysicalRange(
        unit="dBm",
        refuse_below=-300.0,
        refuse_above=60.0,
        usual_low=-200.0,
        usual_high=30.0,
        source="physics and common practice: kT at 1 K is -229 dBm/Hz; no analyzer input "
        "survives +60 dBm",
    ),
}


_warned: set[tuple[str, str, float]] = set()


def check_range(
    key: str,
    field: str,
    value: float,
    *,
    on_purpose: bool = False,
    warn: bool = True,
) -> float:
    """``value`` checked against ``RANGES[key]``: InputError outside the refuse limits (naming
    ``field``, the likely slip and the source), one logged warning outside the usual range.

    ``on_purpose`` lowers the refuse limit to ``purpose_below`` where the range has one (a
    cryogenic load stated in the plan). Non-finite values are always refused.
    """
    spec = RANGES[key]
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise InputError(field, f"must be a number (got {value!r})") from None
    if not math.isfinite(x):
        raise InputError(field, f"must be a finite number (got {x!r})", fix=f"give {spec.unit}")
    low = spec.refuse_below
    if on_purpose and spec.purpose_below is not None:
        low = spec.purpose_below
    if low is not None and x < low:
        raise InputError(field, _refusal(spec, x, low, spec.low_hint, on_purpose))
    if spec.refuse_above is not None and x > spec.refuse_above:
        raise InputError(field, _refusal(spec, x, spec.refuse_above, spec.high_hint, on_purpose))
    if warn:
        warn_unusual(key, field, x)
    return x


def warn_unusual(key: str, label: str, value: float) -> bool:
    """Log once per (key, label, value) when ``value`` is legal but unusual; True if unusual."""
    if not is_unusual(key, value):
        return False
    token = (key, label, float(value))
    if token not in _warned:
        _warned.add(token)
        logger.warning("%s", unusual_message(key, label, float(value)))
    return True


def is_unusual(key: str, value: float) -> bool:
    spec = RANGES[key]
    return (spec.usual_low is not None and value < spec.usual_low) or (
        spec.usual_high is not None and value > spec.usual_high
    )


def unusual_message(key: str, field: str, value: float) -> str:
    spec = RANGES[key]
    return (
        f"{field}: {value:g} {spec.unit} is legal but unusual (usual "
        f"{_span(spec.usual_low, spec.usual_high, spec.unit)}; {spec.source})"
    )


def _refusal(
    spec: PhysicalRange, x: float, limit: float, hint: str | None, on_purpose: bool
) -> str:
    side = "below" if x < limit else "above"
    text = f"{_value(x, spec.unit)} is {side} the plausible {_value(limit, spec.unit)}"
    if hint:
        text += f": {hint}"
        if hint == TEMPERATURE_HINT_C and -100.0 < x < 100.0:
            text += f"; {x:g} degC would be {x + 273.15:g} K"
    if spec.purpose_hint and not on_purpose and x < limit and spec.purpose_below is not None:
        text += f"; {spec.purpose_hint}"
    return f"{text} ({spec.source})"


def frequency_column_problem(freqs_hz: list[float], column: str) -> str | None:
    """A ``freq_hz`` column whose highest frequency is below 1 MHz almost surely holds MHz
    (or GHz) numbers: the message, or None. A table really below 1 MHz states it on purpose
    by naming its column ``freq_khz``."""
    finite = [f for f in freqs_hz if math.isfinite(f) and f > 0]
    usual = RANGES["frequency_hz"].usual_low
    if column != "freq_hz" or not finite or usual is None or max(finite) >= usual:
        return None
    return (
        f"every frequency is below {format_frequency(usual)} (highest "
        f"{format_frequency(max(finite))}): the numbers look "
        "like MHz or GHz under a freq_hz header; name the column freq_mhz or freq_ghz (or "
        "freq_khz for a table that really lies below 1 MHz)"
    )


def describe_ranges() -> list[tuple[str, str, str, str, str]]:
    """(key, refused outside, usual, source, how to state it on purpose or "") rows, for
    ``noisebench info --ranges``."""
    rows = []
    for key, r in RANGES.items():
        purpose = ""
        if r.purpose_hint:
            purpose = r.purpose_hint
            if r.purpose_below is not None:
                purpose += f" (then refused only below {_value(r.purpose_below, r.unit)})"
        rows.append(
            (
                key,
                _span(r.refuse_below, r.refuse_above, r.unit),
                _span(r.usual_low, r.usual_high, r.unit),
                r.source,
                purpose,
            )
        )
    return rows
