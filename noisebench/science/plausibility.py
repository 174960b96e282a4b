"""Plausibility of what an analyzer sent back, checked before any physics runs.

A trace can be wrong in ways no setting describes: the instrument marks a point it has no data
for with the SCPI not-a-number code, a profile announces one byte order while the instrument
sends the other (the numbers decode to garbage spanning 1e-45..1e38), or a reading is a linear
value where dBm was promised. Each of these gets an :class:`~noisebench.errors.InputError`
(field ``trace.values``) that names the cause and the fix, instead of an overflow and a
message about something else.
The scatter checks (a frozen trace, averaging in a state the settings do not describe) live in
the estimator, which knows the statistics.
"""

from __future__ import annotations

import numpy as np

from noisebench.errors import InputError
from noisebench.science.ranges import RANGES
from noisebench.units import format_frequency

SCPI_NOT_A_NUMBER = 9.91e37
"""SCPI-1999 Vol. 1 §7.2.1.5: NaN is sent as 9.91E+37; +/-infinity as +/-9.9E+37."""
SCPI_INFINITY = 9.9e37
_SCPI_CODE_TOLERANCE = 1e-3  # relative; float32 transfer rounds 9.91e37 to 7 digits

BYTE_ORDER_FIX = (
    "the data were mis-decoded: check the byte-order command and the 'big_endian' setting of "
    "the trace in the instrument profile (they must agree), or use the ASCII transfer"
)


def _is_scpi_code(values: np.ndarray) -> np.ndarray:
    a = np.abs(values)
    return (np.abs(a - SCPI_NOT_A_NUMBER) <= _SCPI_CODE_TOLERANCE * SCPI_NOT_A_NUMBER) | (
        np.abs(a - SCPI_INFINITY) <= _SCPI_CODE_TOLERANCE * SCPI_INFINITY
    )


def check_trace_values(
    values: np.ndarray,
    *,
    logarithmic: bool,
    freq_hz: np.ndarray | None = None,
    decode_fix: str | None = None,
) -> None:
    """Refuse SCPI not-a-number codes, non-finite values and levels no analyzer displays.

    ``logarithmic``: the values are dBm (or dBm/Hz); otherwise linear W (or W/Hz), which must be
    > 0. The level range is ``RANGES["trace_level_dbm"]`` (-300..+60 dBm). ``decode_fix`` says
    what to check when the values look mis-decoded (default: the byte order).
    """
    v = np.asarray(values, dtype=float)
    spec = RANGES["trace_level_dbm"]
    lo, hi = float(spec.refuse_below), float(spec.refuse_above)  # type: ignore[arg-type]
    if logarithmic and v.size:
        # the common case in four reductions: every value within the range (so finite and no
        # SCPI code, both far outside it) and none a denormal-like decoding artefact
        a = np.abs(v)
        if (
            lo <= v.min()
            and v.max() <= hi
            and (a.min() >= 1e-30 or not np.any((v != 0) & (a < 1e-30)))
        ):
            return
    where = _where_fn(freq_hz)
    code = _is_scpi_code(v) | ~np.isfinite(v)
    if np.any(code):
        bad = np.flatnonzero(code)
        i = int(bad[0])
        raise InputError(
            "trace.values",
            f"the instrument reported no data at point {i}{where(i)} ({v[i]:.4g}, the SCPI "
            f"not-a-number/infinity code; {bad.size} of {v.size} points): the sweep may not have "
            "completed, the trace may be blanked or its detector unset; check the trace state "
            "and acquire again",
        )
    if logarithmic:
        outside = (v < lo) | (v > hi) | ((v != 0) & (np.abs(v) < 1e-30))
    else:
        positive = v > 0
        level = np.where(positive, 10.0 * np.log10(np.where(positive, v, 1.0) / 1e-3), -np.inf)
        outside = ~positive | (level < lo) | (level > hi)
    if np.any(outside):
        bad = np.flatnonzero(outside)
        i = int(bad[0])
        unit = "dBm" if logarithmic else "W"
        fix = decode_fix or BYTE_ORDER_FIX
        if not logarithmic and np.all(v[bad] <= 0):
            fix = "a linear trace must be > 0 W: check the trace unit (dBm sent as W?)"
        raise InputError(
            "trace.values",
            f"{bad.size} of {v.size} trace points lie outside any level an analyzer displays "
            f"({lo:g}..{hi:g} dBm), first at point {i}{where(i)}: {v[i]:.4g} {unit}; {fix}",
        )


def _where_fn(freq_hz: np.ndarray | None):
    def where(i: int) -> str:
        if freq_hz is None or i >= np.size(freq_hz):
            return ""
        return f" ({format_frequency(float(np.asarray(freq_hz)[i]))})"

    return where
