"""Several averaged traces combined into one, as if the instrument had averaged them all.

When the averages a point needs exceed what the analyzer can do in one trace, the sequencer
takes ``K`` traces of ``N_1 .. N_K`` averages with identical settings and combines them here.
The combination must reproduce the statistic of ONE trace of ``N = sum N_k`` averages on the
same averaging scale, because the detector/averaging model
(:mod:`noisebench.science.detection`) corrects a trace by its scale and its total count:

- power scale (arithmetic mean of linear powers): ``P = sum N_k P_k / N`` - the mean of all
  ``N`` values;
- log-power scale (mean of dB values, i.e. the geometric mean of the powers): the dB values
  combine as ``L = sum N_k L_k / N`` - the mean of all ``N`` logarithms. Averaging the linear
  powers ``10^(L_k/10)`` instead would give neither the geometric mean of the ``N`` values nor
  the arithmetic one: its bias is that of an ``N_k``-value geometric mean (for single samples
  ``Gamma(1 + 1/N_k)^N_k``), not of an ``N``-value one, so the count-``N`` correction would be
  wrong by ``10 log10[Gamma(1 + 1/N_k)^N_k / Gamma(1 + 1/N)^N]`` (0.17 dB for two traces of
  10 single-sample averages; 0.0002 dB for three of 10 000);
- voltage scale (envelope volts averaged, then squared): ``sqrt(P) = sum N_k sqrt(P_k) / N``
  - the mean of all ``N`` envelope values, then squared.

With equal-weight averaging in the instrument each rule is exact: the combined point is
identically distributed to one ``N``-average point, so every later step (bias correction,
variance, scatter test) applies unchanged with ``averages = N``. Tested against that brute-force
reference in ``tests/test_trace_combine.py``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from noisebench.bench.acquisition import AveragingScale, Trace, TraceUnit
from noisebench.errors import InputError

__all__ = ["combine_traces", "split_averages"]


def split_averages(total: int, per_trace_max: int | None) -> list[int]:
    """Averages of each trace when ``total`` exceeds ``per_trace_max``: as equal as possible
    (counts differ by at most one), fewest traces. ``per_trace_max=None``: one trace."""
    if total < 1:
        raise InputError("averages", f"must be >= 1 (got {total})")
    if per_trace_max is None or total <= per_trace_max:
        return [int(total)]
    if per_trace_max < 1:
        raise InputError("max averages per trace", f"must be >= 1 (got {per_trace_max})")
    count = math.ceil(total / per_trace_max)
    base, extra = divmod(int(total), count)
    return [base + 1] * extra + [base] * (count - extra)


def _to_linear(values: np.ndarray, unit: TraceUnit) -> np.ndarray:
    if unit in (TraceUnit.DBM, TraceUnit.DBM_PER_HZ):
        return 10.0 ** (values / 10.0)
    return values.astype(float)


def _from_linear(power: np.ndarray, unit: TraceUnit) -> np.ndarray:
    if unit in (TraceUnit.DBM, TraceUnit.DBM_PER_HZ):
        return 10.0 * np.log10(power)
    return power


def combine_traces(traces: Sequence[Trace]) -> Trace:
    """One trace equivalent to averaging all of ``traces`` at once (see module doc).

    The traces must share frequencies, unit, and every setting except the average count."""
    if not traces:
        raise InputError("traces", "no traces to combine", fix="acquire at least one trace")
    first = traces[0]
    if len(traces) == 1:
        return first
    reference = first.settings.model_dump(exclude={"averages"})
    for i, t in enumerate(traces[1:], start=1):
        if t.unit is not first.unit or not np.array_equal(t.freq_hz, first.freq_hz):
            raise InputError(f"traces[{i}]", "has other frequencies or unit than the first trace")
        if t.settings.model_dump(exclude={"averages"}) != reference:
            raise InputError(
                f"traces[{i}].settings",
                "differ from the first trace's (only the average count may differ)",
                fix="combine traces taken with the same settings",
            )
    counts = np.array([t.settings.averages for t in traces], dtype=float)
    weights = counts / counts.sum()
    values = np.stack([t.values for t in traces])
    scale = first.settings.averaging_scale
    if scale is AveragingScale.LOG_POWER:
        if first.unit in (TraceUnit.DBM, TraceUnit.DBM_PER_HZ):
            combined = weights @ values
        else:
            combined = np.exp(weights @ np.log(values))
    elif scale is AveragingScale.VOLTAGE:
        envelope = np.sqrt(_to_linear(values, first.unit))
        combined = _from_linear((weights @ envelope) ** 2, first.unit)
    else:
        combined = _from_linear(weights @ _to_linear(values, first.unit), first.unit)
    times = [t.acquisition_time_s for t in traces]
    return first.model_copy(
        update={
            "values": np.asarray(combined, dtype=float),
            "settings": first.settings.model_copy(update={"averages": int(counts.sum())}),
            "acquisition_time_s": (
                None
                if any(t is None for t in times)
                else float(sum(t for t in times if t is not None))
            ),
        }
    )
