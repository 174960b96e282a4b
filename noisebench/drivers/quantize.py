"""How an instrument rounds what it is sent: quantisation rules and units of a profile setting.

Pure functions, no I/O. A profile declares, per numeric setting:

- ``unit``: the unit the instrument's commands use (``"MHz"``, ``"kHz"``, ``"ms"``, ...). The
  plan and the profile's ``min``/``max``/``allowed``/``fixed`` stay in our SI units (the unit in
  the setting's key: Hz for ``rbw_hz``); values are divided by the unit's scale when sent and
  multiplied when read back.
- ``allowed = [..]``: the exact values the instrument accepts (e.g. a list of RBWs), or
  ``sequence = "1-3-10"``: a decade sequence of mantissas (``"1-2-5"``, ``"1-2-3-5"``,
  ``"1-3"`` ...) from ``min`` to ``max``; ``step = 10``: multiples of a step (attenuators);
  ``rounding``: ``"nearest"`` (default; nearest on a log scale for sequences and lists),
  ``"up"`` or ``"down"`` - what the instrument does with a value between two allowed ones.
- ``out_of_range = "clamp"``: the instrument clamps a value outside ``min``/``max`` to the
  limit (many clamp trace points) instead of refusing it (``"refuse"``, the default).

:func:`quantized` predicts the applied value, so trace point counts, ``estimate`` and
``validate`` use what the instrument will apply, not what the plan asked for.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence

__all__ = [
    "UNIT_SCALES",
    "decade_sequence",
    "parse_sequence",
    "quantized",
    "reply_unit_scale",
    "unit_scale",
]

#: Scale of each unit relative to our SI unit (``value_si = value_in_unit * scale``).
UNIT_SCALES: dict[str, float] = {
    "Hz": 1.0,
    "kHz": 1e3,
    "MHz": 1e6,
    "GHz": 1e9,
    "s": 1.0,
    "ms": 1e-3,
    "us": 1e-6,
    "ns": 1e-9,
    "dB": 1.0,
    "dBm": 1.0,
    "V": 1.0,
    "mV": 1e-3,
    "A": 1.0,
    "mA": 1e-3,
}

# SCPI-1999 unit suffixes in replies (case-insensitive; MHZ is mega hertz, MA milli ampere;
# from memory)
_REPLY_SUFFIXES: dict[str, tuple[str, float]] = {
    "HZ": ("Hz", 1.0),
    "KHZ": ("Hz", 1e3),
    "MHZ": ("Hz", 1e6),
    "GHZ": ("Hz", 1e9),
    "S": ("s", 1.0),
    "MS": ("s", 1e-3),
    "US": ("s", 1e-6),
    "NS": ("s", 1e-9),
    "DB": ("dB", 1.0),
    "DBM": ("dBm", 1.0),
    "V": ("V", 1.0),
    "MV": ("V", 1e-3),
    "A": ("A", 1.0),
    "MA": ("A", 1e-3),
}
_BASE_OF_UNIT = {
    "Hz": "Hz",
    "kHz": "Hz",
    "MHz": "Hz",
    "GHz": "Hz",
    "s": "s",
    "ms": "s",
    "us": "s",
    "ns": "s",
    "dB": "dB",
    "dBm": "dBm",
    "V": "V",
    "mV": "V",
    "A": "A",
    "mA": "A",
}
_SEQUENCE = re.compile(r"^\d+(?:\.\d+)?(?:-\d+(?:\.\d+)?)+$")


def unit_scale(unit: str | None) -> float:
    """Scale of ``unit`` to SI (``"MHz"`` -> 1e6); None -> 1. ValueError for unknown units."""
    if unit is None:
        return 1.0
    if unit not in UNIT_SCALES:
        raise ValueError(f"unit {unit!r} is not one of {sorted(UNIT_SCALES)}")
    return UNIT_SCALES[unit]


def reply_unit_scale(suffix: str, unit: str | None) -> float:
    """Scale of a reply's unit suffix (``"MHZ"``) to SI; ValueError if it does not fit ``unit``."""
    key = suffix.strip().upper()
    if key not in _REPLY_SUFFIXES:
        raise ValueError(f"unit suffix {suffix!r} is not a known SCPI unit")
    base, scale = _REPLY_SUFFIXES[key]
    if unit is not None and _BASE_OF_UNIT.get(unit) not in (None, base):
        raise ValueError(f"unit suffix {suffix!r} does not fit the setting's unit {unit!r}")
    return scale


def parse_sequence(text: str) -> tuple[float, ...]:
    """``"1-3-10"`` -> (1.0, 3.0): the mantissas of one decade. ValueError if malformed."""
    if not _SEQUENCE.fullmatch(text.strip()):
        raise ValueError(f"sequence {text!r} must look like '1-3-10' or '1-2-5'")
    numbers = [float(part) for part in text.strip().split("-")]
    if numbers[-1] == 10.0:
        numbers = numbers[:-1]
    if numbers[0] != 1.0 or any(b <= a for a, b in zip(numbers, numbers[1:], strict=False)):
        raise ValueError(f"sequence {text!r} must start at 1 and increase below 10")
    if numbers[-1] >= 10.0:
        raise ValueError(f"sequence {text!r} must stay below 10 within the decade")
    return tuple(numbers)


def decade_sequence(mantissas: Sequence[float], low: float, high: float) -> list[float]:
    """All values ``m * 10**k`` of the sequence within [low, high] (low > 0), ascending."""
    if not (low > 0 and high >= low):
        raise ValueError("a decade sequence needs 0 < min <= max")
    values: list[float] = []
    first = math.floor(math.log10(low)) - 1
    last = math.ceil(math.log10(high)) + 1
    for k in range(first, last + 1):
        for m in mantissas:
            v = float(f"{m * 10.0**k:.12g}")
            if low * (1 - 1e-12) <= v <= high * (1 + 1e-12):
                values.append(v)
    return sorted(set(values))


def quantized(
    value: float,
    *,
    allowed: Sequence[float] | None = None,
    step: float | None = None,
    rounding: str = "nearest",
    low: float | None = None,
    high: float | None = None,
    clamp: bool = False,
) -> float:
    """The value an instrument applies for ``value``: clamped to [low, high] when ``clamp``,
    then rounded to one of ``allowed`` (nearest on a log scale when all are > 0) or to a
    multiple of ``step``, in the direction ``rounding``."""
    v = float(value)
    if clamp:
        if low is not None:
            v = max(v, low)
        if high is not None:
            v = min(v, high)
    if allowed:
        return _pick(v, sorted(allowed), rounding)
    if step:
        ratio = v / step
        if rounding == "up":
            n = math.ceil(ratio - 1e-9)
        elif rounding == "down":
            n = math.floor(ratio + 1e-9)
        else:
            n = math.floor(ratio + 0.5)
        result = n * step
        if low is not None and result < low:
            result += step * math.ceil((low - result) / step - 1e-9)
        if high is not None and result > high:
            result -= step * math.ceil((result - high) / step - 1e-9)
        return float(f"{result:.12g}")
    return v


def _pick(v: float, values: list[float], rounding: str) -> float:
    if rounding == "up":
        above = [a for a in values if a >= v * (1 - 1e-12)]
        return above[0] if above else values[-1]
    if rounding == "down":
        below = [a for a in values if a <= v * (1 + 1e-12)]
        return below[-1] if below else values[0]
    if v > 0 and values[0] > 0:
        return min(values, key=lambda a: (abs(math.log(a / v)), a))
    return min(values, key=lambda a: (abs(a - v), a))
