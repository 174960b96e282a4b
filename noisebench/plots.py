"""Figures of a run: noise figure, gain, raw noise densities and the uncertainty budget.

Rendered with matplotlib's object-oriented API on the Agg canvas (headless, no pyplot, no
global backend switch), imported lazily so the core library never needs matplotlib.

==========================  ========================================================================
``noise_figure.png``        NF vs frequency with uncertainty bars and NF limit lines; points
                            coloured by verdict when the record carries one
``gain.png``                DUT gain vs frequency with uncertainty bars and gain limit lines
                            (only when gains were measured or given)
``densities.png``           the raw noise densities behind each point, dBm/Hz
                            (``dut``/``floor`` or ``hot``/``cold``/``hot_cal``/``cold_cal``)
``uncertainty.png``         the budget's contributions, combined and expanded uncertainty vs
                            frequency (only with budgets)
==========================  ========================================================================

Each ``*_figure(record)`` returns a matplotlib ``Figure`` (or ``None`` when it does not apply),
for notebooks; :func:`render_figures` turns them into PNG bytes and :func:`plot_run` into files.
Error bars are the expanded uncertainty ``U`` (coverage factor ``k`` from the budgets; a Monte
Carlo budget's coverage interval, which may be asymmetric) when every point has a budget,
otherwise the standard uncertainty (k = 1); the legend says which. Sweeps of more than
``DENSE_SWEEP_POINTS`` points show the uncertainty as a shaded band instead of bars. The
frequency axis is logarithmic when the sweep spans more than a decade.
"""

from __future__ import annotations

import io
import logging
import math
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from noisebench.errors import InputError
from noisebench.physics import w_per_hz_to_dbm_per_hz
from noisebench.results import PLOTS_DIR, RunRecord

logger = logging.getLogger(__name__)

FIGURE_SIZE_IN = (8.0, 4.5)
DENSE_SWEEP_POINTS = 120  # beyond this, uncertainty is drawn as a band, not as error bars
DEFAULT_DPI = 110

# A quiet palette of our own: ink for data, brick for limits, plain verdict colours.
INK = "#1f3b57"
GRID = "#d9dde3"
LIMIT = "#a23b2a"
SERIES = ("#1f3b57", "#c07a12", "#3d8a5c", "#7a4f9a", "#8c8c8c", "#2c8c99")
VERDICT_STYLE: dict[str, tuple[str, str]] = {  # verdict -> (colour, marker)
    "pass": ("#2e7d4f", "o"),
    "fail": ("#b3261e", "X"),
    "indeterminate": ("#c07a12", "D"),
}

#: Keys of a limit band (``verdict["limits"]`` entries) drawn on each plot, with legend text.
LIMIT_LABELS = {"nf_max_db": "NF limit (max)", "gain_min_db": "gain limit (min)",
                "gain_max_db": "gain limit (max)"}
NF_LIMIT_KEYS = ("nf_max_db",)
GAIN_LIMIT_KEYS = ("gain_min_db", "gain_max_db")


def _matplotlib():
    try:
        from matplotlib.figure import Figure
    except ImportError:
        raise InputError("plots", "matplotlib is not installed",
                         fix="pip install 'noisebench[plots]'") from None
    return Figure


# ----------------------------------------------------------------------------- axes helpers


def frequency_scale(freq_hz: Sequence[float]) -> tuple[float, str]:
    """Divisor and unit name for a frequency axis (Hz, kHz, MHz or GHz)."""
    top = max(abs(f) for f in freq_hz) if len(freq_hz) else 1.0
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if top >= scale:
            return scale, unit
    return 1.0, "Hz"


def use_log_axis(freq_hz: Sequence[float]) -> bool:
    """True when the sweep spans more than one decade."""
    positive = [f for f in freq_hz if f > 0]
    return len(positive) > 1 and max(positive) / min(positive) > 10.0


def _new_axes(title: str, ylabel: str, freq_hz: Sequence[float]):
    figure = _matplotlib()(figsize=FIGURE_SIZE_IN, layout="constrained")
    axes = figure.add_subplot()
    scale, unit = frequency_scale(freq_hz)
    if use_log_axis(freq_hz):
        axes.set_xscale("log")
    axes.set_title(title, loc="left", fontsize=11, color=INK)
    axes.set_xlabel(f"Frequency ({unit})")
    axes.set_ylabel(ylabel)
    axes.grid(True, which="both", color=GRID, linewidth=0.6)
    axes.set_axisbelow(True)
    for side in ("top", "right"):
        axes.spines[side].set_visible(False)
    return figure, axes, scale


def plain_text(text: str) -> str:
    """Text from the record as matplotlib shows it literally: no mathtext, no hidden label."""
    text = str(text).replace("$", r"\$")
    return f" {text}" if text.startswith("_") else text  # '_x' labels are skipped by legends


def to_png(figure, dpi: int = DEFAULT_DPI) -> bytes:
    """PNG bytes of a matplotlib figure."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=dpi, metadata={"Software": "noisebench"})
    return buffer.getvalue()


# ----------------------------------------------------------------------------- data helpers


def nf_error_bars(record: RunRecord) -> tuple[np.ndarray, str]:
    """NF error bars as a (2, n) array of (below, above) distances in dB, and their legend text.

    The expanded uncertainty when every point has a budget with ``U_expanded_db`` (a Monte
    Carlo budget's coverage interval ``monte_carlo.interval_db`` gives asymmetric bars);
    otherwise the standard uncertainty ``u_nf_db`` (k = 1).
    """
    by_freq = record.budgets_by_freq()
    budgets = [by_freq.get(p.freq_hz) for p in record.points]
    if not record.points or not all(
            b and isinstance(b.get("U_expanded_db"), (int, float)) for b in budgets):
        u = np.array([p.u_nf_db for p in record.points], dtype=float)
        return np.vstack([u, u]), "standard uncertainty u (k = 1)"
    bars = np.array([_expanded_bar(p.nf_db, b) for p, b in zip(record.points, budgets,
                                                                strict=True)]).T
    ks = {b.get("k") for b in budgets}
    k = ks.pop() if len(ks) == 1 else None
    k_text = f"k = {k:g}" if isinstance(k, (int, float)) else "k per point"
    return bars, f"expanded uncertainty U ({k_text})"


def _expanded_bar(nf_db: float, budget: dict[str, Any]) -> tuple[float, float]:
    interval = (budget.get("monte_carlo") or {}).get("interval_db")
    if (isinstance(interval, (list, tuple)) and len(interval) == 2
            and all(isinstance(v, (int, float)) for v in interval)
            and interval[0] <= nf_db <= interval[1]):
        return nf_db - interval[0], interval[1] - nf_db
    return budget["U_expanded_db"], budget["U_expanded_db"]


def limit_segments(record: RunRecord, keys: Sequence[str]) -> list[tuple[float, float, float, str]]:
    """``(start_hz, stop_hz, value_db, key)`` per band of ``verdict["limits"]`` having ``keys``."""
    limits = (record.verdict or {}).get("limits") or []
    segments = []
    for band in limits:
        if not isinstance(band, dict):
            continue
        start, stop = band.get("start_hz"), band.get("stop_hz")
        if not all(isinstance(v, (int, float)) for v in (start, stop)):
            continue
        for key in keys:
            value = band.get(key)
            if isinstance(value, (int, float)) and math.isfinite(value):
                segments.append((float(start), float(stop), float(value), key))
    return segments


def _draw_limits(axes, segments, scale: float) -> None:
    for index, (start, stop, value, key) in enumerate(segments):
        label = LIMIT_LABELS.get(key, key)
        axes.hlines(value, start / scale, stop / scale, colors=LIMIT, linestyles="--",
                    linewidth=1.6, label=label if index == _first_index(segments, key) else None)


def _first_index(segments, key: str) -> int:
    return next(i for i, seg in enumerate(segments) if seg[3] == key)


def _draw_with_uncertainty(axes, freq: np.ndarray, values: np.ndarray, bars: np.ndarray,
                           label: str) -> None:
    """Values with (below, above) uncertainty: error bars, or a shaded band for dense sweeps."""
    if len(values) <= DENSE_SWEEP_POINTS:
        axes.errorbar(freq, values, yerr=bars, color=INK, ecolor=INK, elinewidth=0.9,
                      capsize=2.5, marker=".", markersize=5, linewidth=1.2, label=label)
        return
    axes.fill_between(freq, values - bars[0], values + bars[1], color=INK, alpha=0.22,
                      linewidth=0, label=label.split(" ± ", 1)[-1])
    axes.plot(freq, values, color=INK, linewidth=1.0, label=label.split(" ± ", 1)[0])


def _draw_verdicts(axes, record: RunRecord, freq: np.ndarray, values: np.ndarray) -> None:
    """Mark points by verdict; dense sweeps mark only the points that did not pass."""
    verdicts = record.verdicts_by_freq()
    words = np.array([str((verdicts.get(p.freq_hz) or {}).get("verdict")) for p in record.points])
    dense = len(values) > DENSE_SWEEP_POINTS
    for verdict, (colour, marker) in VERDICT_STYLE.items():
        mask = words == verdict
        if mask.any() and not (dense and verdict == "pass"):
            axes.scatter(freq[mask], values[mask], s=14 if dense else 36, color=colour,
                         marker=marker, zorder=4, label=verdict)


# ----------------------------------------------------------------------------- figures


def nf_figure(record: RunRecord):
    """Figure of NF vs frequency with error bars, limit lines and verdict markers."""
    freq_hz = [p.freq_hz for p in record.points]
    figure, axes, scale = _new_axes(_title(record, "Noise figure"), "Noise figure (dB)", freq_hz)
    freq = np.array(freq_hz) / scale
    nf = np.array([p.nf_db for p in record.points])
    bars, bar_label = nf_error_bars(record)
    _draw_with_uncertainty(axes, freq, nf, bars, f"NF ± {bar_label}")
    _draw_limits(axes, limit_segments(record, NF_LIMIT_KEYS), scale)
    if record.verdict:
        _draw_verdicts(axes, record, freq, nf)
    axes.legend(loc="best", fontsize=8, frameon=False)
    return figure


def gain_figure(record: RunRecord):
    """Figure of DUT gain vs frequency with standard-uncertainty bars and limits, or None."""
    points = [p for p in record.points if p.gain_db is not None]
    if not points:
        return None
    freq_hz = [p.freq_hz for p in points]
    figure, axes, scale = _new_axes(_title(record, "Gain"), "Gain (dB)", freq_hz)
    freq = np.array(freq_hz) / scale
    gain = np.array([p.gain_db for p in points], dtype=float)
    u_gain = np.array([p.u_gain_db or 0.0 for p in points], dtype=float)
    if u_gain.any():
        _draw_with_uncertainty(axes, freq, gain, np.vstack([u_gain, u_gain]),
                               "gain ± standard uncertainty (k = 1)")
    else:
        axes.plot(freq, gain, color=INK, marker=".", markersize=5, linewidth=1.2, label="gain")
    _draw_limits(axes, limit_segments(record, GAIN_LIMIT_KEYS), scale)
    axes.legend(loc="best", fontsize=8, frameon=False)
    return figure


def density_series(record: RunRecord) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per density name: (freq_hz, density_dbm_per_hz), skipping non-positive values."""
    names: list[str] = []
    for point in record.points:
        names += [n for n in point.densities_w_per_hz if n not in names]
    series = {}
    for name in names:
        pairs = [(p.freq_hz, p.densities_w_per_hz[name]) for p in record.points
                 if p.densities_w_per_hz.get(name, 0.0) > 0]
        if pairs:
            freq, density = np.array(pairs).T
            series[name] = (freq, np.atleast_1d(w_per_hz_to_dbm_per_hz(density)))
    return series


def densities_figure(record: RunRecord):
    """Figure of the raw noise densities (dBm/Hz) vs frequency, or None without densities."""
    series = density_series(record)
    if not series:
        return None
    freq_hz = [p.freq_hz for p in record.points]
    figure, axes, scale = _new_axes(_title(record, "Measured noise densities"),
                                    "Noise density (dBm/Hz)", freq_hz)
    for index, (name, (freq, dbm_per_hz)) in enumerate(series.items()):
        axes.plot(freq / scale, dbm_per_hz, marker=".", markersize=4, linewidth=1.1,
                  color=SERIES[index % len(SERIES)], label=plain_text(name.replace("_", " ")))
    axes.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=8, frameon=False)
    return figure


def budget_series(record: RunRecord) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per contribution name (plus ``u_c`` and ``U``): (freq_hz, |contribution| in dB)."""
    series: dict[str, list[tuple[float, float]]] = {}
    for budget in record.budgets:
        freq = budget.get("freq_hz")
        if not isinstance(freq, (int, float)):
            continue
        for item in budget.get("contributions") or []:
            value = item.get("contribution_db") if isinstance(item, dict) else None
            if isinstance(value, (int, float)):
                series.setdefault(str(item.get("name", "?")), []).append((freq, abs(value)))
        for key, label in (("u_combined_db", "combined u_c"), ("U_expanded_db", "expanded U")):
            if isinstance(budget.get(key), (int, float)):
                series.setdefault(label, []).append((freq, float(budget[key])))
    return {name: tuple(np.array(pairs).T) for name, pairs in series.items()}


def budget_figure(record: RunRecord):
    """Figure of uncertainty contributions vs frequency, or None without budgets."""
    series = budget_series(record)
    if not series:
        return None
    freq_hz = [b["freq_hz"] for b in record.budgets if isinstance(b.get("freq_hz"), (int, float))]
    figure, axes, scale = _new_axes(_title(record, "Uncertainty budget"),
                                    "Contribution to NF (dB)", freq_hz)
    for index, (name, (freq, value)) in enumerate(series.items()):
        total = name in ("combined u_c", "expanded U")
        axes.plot(freq / scale, value, linewidth=2.0 if total else 1.0,
                  linestyle="-" if total else ":", marker="" if total else ".",
                  color=INK if name == "expanded U" else SERIES[(index + 1) % len(SERIES)],
                  label=plain_text(name))
    axes.set_ylim(bottom=0)
    axes.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7, frameon=False)
    return figure


def _title(record: RunRecord, what: str) -> str:
    dut = plain_text(record.info.dut_id or "DUT")
    return f"{what} · {dut} · {record.info.method.value.replace('_', '-')} method"


# ----------------------------------------------------------------------------- entry points

FIGURES = (
    ("noise_figure.png", nf_figure),
    ("gain.png", gain_figure),
    ("densities.png", densities_figure),
    ("uncertainty.png", budget_figure),
)


def render_figures(record: RunRecord, dpi: int = DEFAULT_DPI) -> dict[str, bytes]:
    """All figures that apply to ``record`` as PNG bytes, keyed by file name (in memory)."""
    if not record.points:
        logger.info("run %s has no points: no figures", record.info.run_id)
        return {}
    figures = {}
    for name, make in FIGURES:
        figure = make(record)
        if figure is not None:
            figures[name] = to_png(figure, dpi)
    return figures


def plot_run(record: RunRecord, folder: Path, *, dpi: int = DEFAULT_DPI) -> list[Path]:
    """Write the run's figures to ``<folder>/plots/*.png`` (``folder`` is the run folder).

    Returns the written paths (none when the run has no points).
    """
    if not isinstance(record, RunRecord):
        raise InputError("record", f"must be a RunRecord (got {type(record).__name__})",
                         fix="load it with noisebench.results.load_run")
    out = Path(folder) / PLOTS_DIR
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError("folder", f"cannot create {out}: {exc.strerror or exc}",
                         fix="choose a writable folder") from exc
    paths = []
    for name, png in render_figures(record, dpi).items():
        path = out / name
        path.write_bytes(png)
        paths.append(path)
    logger.info("wrote %d figures to %s", len(paths), out)
    return paths


__all__ = [
    "budget_figure", "densities_figure", "density_series", "frequency_scale", "gain_figure",
    "limit_segments", "nf_error_bars", "nf_figure", "plain_text", "plot_run", "render_figures",
    "to_png", "use_log_axis",
]
