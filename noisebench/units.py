"""How a person reads a frequency: one formatter with engineering units for every message,
summary, progress line and report (``2 GHz``, ``10 MHz to 18 GHz``, ``1.28571 GHz``)."""

from __future__ import annotations

import math

#: Engineering prefixes used for frequencies, largest first.
FREQUENCY_UNITS: tuple[tuple[float, str], ...] = (
    (1e12, "THz"),
    (1e9, "GHz"),
    (1e6, "MHz"),
    (1e3, "kHz"),
    (1.0, "Hz"),
)


def format_frequency(freq_hz: float | None, digits: int = 6, *, space: str = " ") -> str:
    """``freq_hz`` with the largest prefix that keeps the number >= 1, in ``digits``
    significant digits, trailing zeros dropped: ``2e9`` -> ``2 GHz``, ``1.5e6`` -> ``1.5 MHz``.
    ``space`` joins number and unit (a no-break space in HTML tables); None (a setting the
    instrument did not report) reads ``unknown``."""
    if freq_hz is None:
        return "unknown"
    value = float(freq_hz)
    if not math.isfinite(value):
        return f"{value}{space}Hz"
    for scale, unit in FREQUENCY_UNITS:
        if abs(value) >= scale:
            return f"{value / scale:.{digits}g}{space}{unit}"
    return f"{value:.{digits}g}{space}Hz"


def format_frequency_range(low_hz: float, high_hz: float, digits: int = 6) -> str:
    """``10 MHz to 18 GHz`` (one value when both ends are equal)."""
    if low_hz == high_hz:
        return format_frequency(low_hz, digits)
    return f"{format_frequency(low_hz, digits)} to {format_frequency(high_hz, digits)}"


__all__ = ["FREQUENCY_UNITS", "format_frequency", "format_frequency_range"]
