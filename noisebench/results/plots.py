"""Figures of a run: noise figure, gain, raw noise densities and the uncertainty budget.

Rendered with matplotlib's object-oriented API on the Agg canvas (headless, no pyplot, no
global backend switch), imported lazily so the core library never needs matplotlib.

==========================  ========================================================================
``noise_figure.png``        NF vs frequency with uncertainty bars, NF limit lines and, with a
                            verdict, each point's verdict as a marker shape and colour
``gain.png``                DUT gain vs frequency with uncertainty bars and gain limit lines
                            (only when gains were measured or given)
``densities.png``           the raw noise densities behind each point at the analyzer, dBm/Hz
                            (DUT / analyzer floor, or hot / cold with and without the DUT)
``uncertainty.png``         the largest standard-uncertainty contributions, the rest combined,
                            u_c and U vs frequency (only with budgets)
==========================  ========================================================================

Each ``*_figure(record)`` returns a matplotlib ``Figure`` (or ``None`` when it does not apply),
for notebooks; :func:`render_figures` turns them into PNG bytes and :func:`plot_run` into files.

Conventions every figure follows:

- The frequency axis is logarithmic when the sweep spans more than a decade, with plain tick
  numbers (0.5, 1, 2, 5) in one unit chosen from the sweep (:func:`frequency_scale`); all
  figures share one axes frame, so their frequency axes line up in the report.
- NF error bars are the expanded uncertainty ``U`` with its coverage factor ``k`` from the
  budgets (a Monte Carlo budget's coverage interval, which may be asymmetric) when every point
  has a budget, otherwise the statistical standard uncertainty (k = 1); gain bars are
  ``k * u_gain`` when the verdict used that, otherwise ``u_gain`` (k = 1). The legend says which.
  Sweeps of more than ``DENSE_SWEEP_POINTS`` points show a shaded band instead of bars and mark
  only the points that did not pass.
- Verdicts are told apart by marker shape as well as colour (:data:`VERDICT_STYLE`; the
  colours stay distinct under simulated protan-, deutan- and tritanopia), limit lines are
  black dashed lines labelled with their value.

Size: one job, the figures of a run; each figure is a short function and all share the axis,
colour and legend helpers at the top.
"""

from __future__ import annotations

import io
import logging
import math
import textwrap
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from noisebench.errors import InputError
from noisebench.results.store import PLOTS_DIR, RunRecord
from noisebench.science.physics import w_per_hz_to_dbm_per_hz

logger = logging.getLogger(__name__)

FIGURE_SIZE_IN = (9.0, 4.6)
#: The axes frame of every figure before its legend is added (left, bottom, width, height as
#: figure fractions), so the frequency axes of all figures line up. The legend goes below the
#: axes in columns and the figure grows downwards by exactly its height (a legend column at
#: the right left about a fifth of each figure blank below a short legend).
AXES_RECT = (0.085, 0.125, 0.885, 0.78)
LEGEND_GAP_IN = 0.06  # between the frequency axis label and the legend, inches
LEGEND_PAD_IN = 0.08  # below the legend, inches
DENSE_SWEEP_POINTS = 120  # beyond this, uncertainty is drawn as a band, not as error bars
DEFAULT_DPI = 110
LEGEND_WIDTH_CHARS = 38
LEGEND_COLUMNS = 3
X_MARGIN = 0.02  # fraction of the frequency axis left free beyond the first and last point
BUDGET_LINES = 6  # contributions drawn one by one; the rest are combined (RSS)
LOG_AXIS_DECADES = 1.0  # a sweep spanning more than this many decades gets a log axis
DENSE_TICK_DECADES = 3.0  # up to this many decades the major ticks are 1-2-5, beyond: decades

# Series colours: not ours - six colours of the published colour-blind-safe palette of
# M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and presentations
# that are friendly to colorblind people" (2008; docs/references.md §18). matplotlib >= 3.10
# ships the same colours as its "okabe_ito" colour sequence. Verdict colours: blue, red, amber (stay
# apart for colour-blind readers, tested with simulated colour-vision deficiency); shapes
# carry the verdict as well.
INK = "#1f3b57"
GRID = "#d9dde3"
GRID_MINOR = "#eef0f3"
LIMIT = "#1a1a1a"
EDGE = "#2b2b2b"
SERIES = ("#0072b2", "#d55e00", "#009e73", "#cc79a7", "#e69f00", "#56b4e9")
SERIES_MARKERS = ("o", "s", "^", "v", "D", "P")
OTHER = "#8c8c8c"
#: verdict -> (colour, matplotlib marker); hollow markers for pass and not judged
VERDICT_STYLE: dict[str, tuple[str, str]] = {
    "pass": ("#0072b2", "o"),
    "fail": ("#c0392b", "X"),
    "indeterminate": ("#e0a100", "D"),
    "not_judged": ("#6b6b6b", "s"),
}
#: The same shapes as text, for tables and legends outside the figures.
VERDICT_SYMBOL = {
    "pass": "\u25cb",
    "fail": "\u2715",
    "indeterminate": "\u25c6",
    "not_judged": "\u25a1",
}
HOLLOW_VERDICTS = ("pass", "not_judged")
#: Flagged points on the NF figure: an open black triangle just above the point's upper bar.
FLAG_MARKER = "v"
FLAG_MARK_WORDS = "an open triangle (\u25bd) above the point"
#: Line styles of budget contributions that coincide with one drawn before them.
COINCIDENT_STYLE = (0, (4, 3))

#: Keys of a limit band (``verdict["limits"]`` entries) drawn on each plot, with legend text.
LIMIT_LABELS = {
    "nf_max_db": "NF limit (max)",
    "gain_min_db": "gain limit (min)",
    "gain_max_db": "gain limit (max)",
}
NF_LIMIT_KEYS = ("nf_max_db",)
GAIN_LIMIT_KEYS = ("gain_min_db", "gain_max_db")

#: Legend text and (colour, line style, marker) of the raw densities the methods store.
DENSITY_STYLE: dict[str, tuple[str, str, str, str]] = {
    "hot": ("DUT, noise source on (hot)", "#d55e00", "-", "o"),
    "cold": ("DUT, noise source off (cold)", "#0072b2", "-", "s"),
    "hot_cal": ("calibration without DUT, source on (hot)", "#d55e00", "--", "^"),
    "cold_cal": ("calibration without DUT, source off (cold)", "#0072b2", "--", "v"),
    "dut": ("DUT output, DUT input terminated", INK, "-", "o"),
    "floor": ("analyzer floor, analyzer input terminated", "#8c8c8c", "--", "s"),
}


@dataclass(frozen=True)
class FigureLayout:
    """How the figures are drawn for one kind of screen: size, text sizes, legend, ticks.

    Text on a screen is ``pt / 72 * shown_px / width_in`` CSS px high (the dpi cancels):
    a figure shrunk to a phone's column needs a narrower drawing, not a smaller dpi.
    """

    name: str
    size_in: tuple[float, float]  # before the legend below the axes adds its height
    axes_rect: tuple[float, float, float, float]  # figure fractions of ``size_in``
    dpi: int
    title_pt: float
    text_pt: float  # tick labels and axis labels
    legend_pt: float
    note_pt: float  # the value written beside a limit line; the smallest text
    legend_columns: int
    legend_chars: int  # legend text is wrapped to this many characters per column
    title_chars: int  # the title is wrapped to this many characters per line
    dense_tick_decades: float  # up to this many decades log-axis majors are 1-2-5
    linear_ticks: int | None  # at most this many major ticks on a linear frequency axis

    @property
    def smallest_pt(self) -> float:
        """The smallest text size in the figures."""
        return min(self.title_pt, self.text_pt, self.legend_pt, self.note_pt)


#: The desktop figures: 9 in wide (990 px at 110 dpi), legend in up to three columns.
WIDE = FigureLayout(
    name="wide",
    size_in=FIGURE_SIZE_IN,
    axes_rect=AXES_RECT,
    dpi=DEFAULT_DPI,
    title_pt=11.0,
    text_pt=10.0,
    legend_pt=8.0,
    note_pt=7.5,
    legend_columns=LEGEND_COLUMNS,
    legend_chars=LEGEND_WIDTH_CHARS,
    title_chars=100,
    dense_tick_decades=DENSE_TICK_DECADES,
    linear_ticks=None,
)
NARROW_WIDTH_IN = 4.4
NARROW_HEIGHT_IN = 4.1
#: axes margins of the narrow figures, inches: left (y tick labels and label), right, bottom
#: (x tick labels and label), top (a one-line title)
NARROW_MARGINS_IN = (0.8, 0.16, 0.56, 0.42)
#: The phone figures: 4.4 in wide and portrait, text of at least 9 pt, the legend stacked in
#: one column below, fewer frequency ticks. On a 390 px phone the figure is shown about 366 px
#: wide, so 9 pt reads 9 / 72 * 366 / 4.4 = 10.4 CSS px (the wide figure's 7.5 pt: 4.2 px).
#: 150 dpi (660 px) keeps it sharp on the phone's denser pixels.
NARROW = FigureLayout(
    name="narrow",
    size_in=(NARROW_WIDTH_IN, NARROW_HEIGHT_IN),
    axes_rect=(
        NARROW_MARGINS_IN[0] / NARROW_WIDTH_IN,
        NARROW_MARGINS_IN[2] / NARROW_HEIGHT_IN,
        1.0 - (NARROW_MARGINS_IN[0] + NARROW_MARGINS_IN[1]) / NARROW_WIDTH_IN,
        1.0 - (NARROW_MARGINS_IN[2] + NARROW_MARGINS_IN[3]) / NARROW_HEIGHT_IN,
    ),
    dpi=150,
    title_pt=11.0,
    text_pt=10.0,
    legend_pt=9.5,
    note_pt=9.0,
    legend_columns=1,
    legend_chars=44,
    title_chars=42,
    dense_tick_decades=1.5,
    linear_ticks=4,
)
LAYOUTS = (WIDE, NARROW)
#: The narrow figures' sub-folder of ``plots/`` and prefix of their names in a figure mapping.
NARROW_DIR = "narrow"
TITLE_PAD_IN = 0.08  # above a title that needs more than the top margin, inches

FREQUENCY_UNITS = ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz"), (1.0, "Hz"))
MAX_TICK_VALUE = 1e5  # a unit is not stepped down so far that tick labels need 6+ digits


def _matplotlib():
    try:
        from matplotlib.figure import Figure
    except ImportError:
        raise InputError(
            "plots", "matplotlib is not installed", fix="pip install 'noisebench[plots]'"
        ) from None
    return Figure


# ----------------------------------------------------------------------------- axes helpers


def use_log_axis(freq_hz: Sequence[float]) -> bool:
    """True when the sweep spans more than one decade."""
    positive = [f for f in freq_hz if f > 0]
    return len(positive) > 1 and max(positive) / min(positive) > 10.0**LOG_AXIS_DECADES


def frequency_scale(freq_hz: Sequence[float]) -> tuple[float, str]:
    """Divisor and unit name (Hz, kHz, MHz or GHz) for a frequency axis or table column.

    The unit of the highest frequency, stepped down while the labels would start below 0.1:
    on a log axis the lowest frequency (10 MHz to 6 GHz reads 10 ... 6000 MHz, not 0.01 GHz),
    on a linear axis the span (2.000 to 2.004 GHz reads 2000 ... 2004 MHz).
    """
    values = [abs(float(f)) for f in freq_hz if f and math.isfinite(f)]
    if not values:
        return 1.0, "Hz"
    top, bottom = max(values), min(values)
    index = next(
        (i for i, (scale, _) in enumerate(FREQUENCY_UNITS) if top >= scale),
        len(FREQUENCY_UNITS) - 1,
    )
    low_end = bottom if use_log_axis(values) else top - bottom
    while index < len(FREQUENCY_UNITS) - 1 and 0 < low_end / FREQUENCY_UNITS[index][0] < 0.1:
        if top / FREQUENCY_UNITS[index + 1][0] >= MAX_TICK_VALUE:
            break
        index += 1
    return FREQUENCY_UNITS[index]


def plain_number(value: float) -> str:
    """A tick value as a plain decimal number: ``0.5``, ``1``, ``20``, ``5000`` (no exponent)."""
    if not math.isfinite(value):
        return str(value)
    text = np.format_float_positional(float(f"{value:.6g}"), trim="-")
    return "0" if text in ("-0", "0.") else text


def log_tick_subs(
    low: float, high: float, dense_decades: float = DENSE_TICK_DECADES
) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """Major and minor tick multipliers per decade for a log axis from ``low`` to ``high``.

    1-2-5 majors (labelled) up to ``dense_decades`` decades, decades only beyond; every
    other integer multiple is a minor tick (unlabelled).
    """
    decades = math.log10(high / low) if low > 0 and high > low else 0.0
    major = (1.0, 2.0, 5.0) if decades <= dense_decades else (1.0,)
    minor = tuple(float(s) for s in range(1, 10) if float(s) not in major)
    return major, minor


def _in_view(locator):
    """``locator`` giving only the ticks inside the axis' view: matplotlib builds a tick
    object (two lines, two texts) for every location a locator returns, and a log locator
    returns a decade beyond each end; those ticks were half of a figure's drawing time."""
    from matplotlib.ticker import Locator

    class InView(Locator):
        def set_axis(self, axis) -> None:
            super().set_axis(axis)
            locator.set_axis(axis)

        def __call__(self):
            low, high = sorted(self.axis.get_view_interval())
            return [t for t in locator() if low <= t <= high]

        def tick_values(self, vmin, vmax):
            low, high = sorted((vmin, vmax))
            return [t for t in locator.tick_values(vmin, vmax) if low <= t <= high]

    return InView()


def _format_frequency_axis(axes, freq: np.ndarray, log: bool, layout: FigureLayout) -> None:
    from matplotlib.ticker import (
        AutoMinorLocator,
        FuncFormatter,
        LogLocator,
        MaxNLocator,
        NullFormatter,
        ScalarFormatter,
    )

    axis = axes.xaxis
    if log:
        axes.set_xscale("log")
        major, minor = log_tick_subs(
            float(freq.min()), float(freq.max()), layout.dense_tick_decades
        )
        axis.set_major_locator(_in_view(LogLocator(base=10.0, subs=major, numticks=200)))
        axis.set_minor_locator(_in_view(LogLocator(base=10.0, subs=minor, numticks=200)))
        axis.set_major_formatter(FuncFormatter(lambda value, _pos: plain_number(value)))
        axis.set_minor_formatter(NullFormatter())
        return
    formatter = ScalarFormatter(useOffset=False)
    formatter.set_scientific(False)
    if layout.linear_ticks:
        axis.set_major_locator(MaxNLocator(nbins=layout.linear_ticks, steps=[1, 2, 2.5, 5, 10]))
    axis.set_major_formatter(formatter)
    axis.set_minor_locator(AutoMinorLocator())


def _fix_frequency_limits(axes, freq: np.ndarray, log: bool) -> None:
    """Set the frequency limits explicitly (sweep ends plus ``X_MARGIN``), so limit lines
    and error bars drawn later cannot widen the axis and every matplotlib version shows the
    same ticks."""
    finite = freq[np.isfinite(freq)] if freq.size else freq
    if finite.size == 0 or finite.min() <= 0 or finite.min() == finite.max():
        return
    lo, hi = float(finite.min()), float(finite.max())
    if log:
        pad = (hi / lo) ** X_MARGIN
        axes.set_xlim(lo / pad, hi * pad)
    else:
        pad = (hi - lo) * X_MARGIN
        axes.set_xlim(lo - pad, hi + pad)


def _new_axes(title: str, ylabel: str, freq_hz: Sequence[float], layout: FigureLayout = WIDE):
    figure = _matplotlib()(figsize=layout.size_in, dpi=layout.dpi)
    axes = figure.add_axes(layout.axes_rect)
    scale, unit = frequency_scale(freq_hz)
    freq = np.asarray(freq_hz, dtype=float) / scale
    log = use_log_axis(freq_hz)
    _format_frequency_axis(axes, freq if freq.size else np.array([1.0]), log, layout)
    axes.margins(x=X_MARGIN)  # the frequency axis ends just past the sweep's ends
    _fix_frequency_limits(axes, freq, log)
    axes.set_title(
        wrap_title(title, layout.title_chars), loc="left", fontsize=layout.title_pt, color=INK
    )
    axes.set_xlabel(f"Frequency ({unit})", fontsize=layout.text_pt)
    axes.set_ylabel(ylabel, fontsize=layout.text_pt)
    axes.tick_params(labelsize=layout.text_pt)
    axes.yaxis.get_major_formatter().set_useOffset(False)
    axes.grid(True, which="major", color=GRID, linewidth=0.7)
    axes.grid(True, which="minor", color=GRID_MINOR, linewidth=0.5)
    axes.set_axisbelow(True)
    for side in ("top", "right"):
        axes.spines[side].set_visible(False)
    return figure, axes, scale


def wrap_title(title: str, width: int) -> str:
    """A figure title in lines of at most ``width`` characters, broken between its
    `` · ``-separated parts where it can (a part longer than a line is wrapped by words)."""
    lines: list[str] = []
    for part in title.split(" \u00b7 "):
        if lines and len(lines[-1]) + 3 + len(part) <= width:
            lines[-1] += " \u00b7 " + part
        else:
            lines += textwrap.wrap(part, width) or [""]
    return "\n".join(lines)


def _legend(axes, layout: FigureLayout = WIDE, title: str | None = None) -> None:
    """The legend below the axes, in as many columns as fit; the figure grows to hold it
    (and at the top, to hold a title that wrapped)."""
    handles, labels = axes.get_legend_handles_labels()
    if not handles:
        _fit_title(axes)
        return
    order = sorted(range(len(labels)), key=lambda i: _legend_rank(labels[i]))
    handles = [handles[i] for i in order]
    wrapped = [_wrap(labels[i], layout.legend_chars) for i in order]
    columns = max(1, min(len(wrapped), layout.legend_columns))
    legend = axes.legend(
        handles,
        wrapped,
        loc="upper left",
        bbox_to_anchor=(0.0, 0.0),
        borderaxespad=0.0,
        fontsize=layout.legend_pt,
        frameon=False,
        labelspacing=0.5,
        columnspacing=1.6,
        ncols=columns,
        title=title and _wrap(title, layout.legend_chars * columns),
        title_fontsize=layout.legend_pt,
        alignment="left",
    )
    if title:
        legend.get_title().set_color("#5b6773")
    _fit_title(axes)
    _place_below_axis_label(axes, legend)


def _fit_title(axes) -> None:
    """Grow the figure at the top when the title (wrapped to more lines than the top margin
    holds) would be cut, keeping the axes' size in inches."""
    figure = axes.figure
    renderer = figure._get_renderer()
    dpi = figure.dpi
    width_in, height_in = figure.get_size_inches()
    title = axes._left_title  # set_title(loc='left'); ``axes.title`` is the centred one
    title_top_in = title.get_window_extent(renderer).y1 / dpi
    extra_in = title_top_in + TITLE_PAD_IN - height_in
    if extra_in <= 0:
        return
    left, bottom, w, h = axes.get_position().bounds
    new_height_in = height_in + extra_in
    figure.set_size_inches(width_in, new_height_in)
    axes.set_position((left, bottom * height_in / new_height_in, w, h * height_in / new_height_in))


def _place_below_axis_label(axes, legend) -> None:
    """Move the legend under the frequency axis label and grow the figure by what it needs,
    keeping the axes' size and position in inches (so all figures' axes line up)."""
    figure = axes.figure
    renderer = figure._get_renderer()  # the Agg renderer; the figure has no canvas window
    dpi = figure.dpi
    # the frequency axis' tick labels and label (the y axis and the legend, a child of the
    # axes, are not below it; laying out only this axis halves the cost of this step)
    label_bottom_px = axes.xaxis.get_tightbbox(renderer).y0
    axes_bottom_px = axes.get_window_extent(renderer).y0
    drop_px = axes_bottom_px - label_bottom_px + LEGEND_GAP_IN * dpi
    axes_height_px = axes.get_window_extent(renderer).height
    legend.set_bbox_to_anchor((0.0, -drop_px / axes_height_px), transform=axes.transAxes)
    legend_px = legend.get_window_extent(renderer).height
    width_in, height_in = figure.get_size_inches()
    below_in = (drop_px + legend_px) / dpi + LEGEND_PAD_IN
    left, bottom, w, h = axes.get_position().bounds
    extra_in = max(0.0, below_in - bottom * height_in)
    new_height_in = height_in + extra_in
    figure.set_size_inches(width_in, new_height_in)
    axes.set_position(
        (left, (bottom * height_in + extra_in) / new_height_in, w, h * height_in / new_height_in)
    )


def _legend_rank(label: str) -> int:
    """Legend order: data first, then limit lines, verdict markers, the flagged mark."""
    if label in LIMIT_LABELS.values():
        return 1
    if label.startswith("flagged"):
        return 3
    return 2 if label.split(":", 1)[0].replace(" ", "_") in VERDICT_STYLE else 0


def _wrap(text: str, width: int = LEGEND_WIDTH_CHARS) -> str:
    """Legend text wrapped to a legend column, never between ``k``, ``=`` and its value."""
    return textwrap.fill(text.replace("k = ", "k\u00a0=\u00a0"), width)


def plain_text(text: str) -> str:
    """Text from the record as matplotlib shows it literally: no mathtext, no hidden label."""
    text = str(text).replace("$", r"\$")
    return f" {text}" if text.startswith("_") else text  # '_x' labels are skipped by legends


#: Colours of a figure's PNG: the most frequent ones, exactly. A figure has a few dozen
#: colours (background, grid, series, text) that cover nearly all of its pixels, plus
#: anti-aliased blends; a pixel whose colour is not among them takes the nearest that is
#: (measured on the report's figures: 0.8 % of the pixels, all on edges, by up to 72/255). About a
#: third of the bytes of full colour, so a report with each figure in two renderings is
#: smaller than one with a single full-colour rendering.
PNG_COLOURS = 256
_LUT_CHUNK = 4096  # colours compared with the palette at a time (4096 x 256 distances)


def to_png(figure, dpi: int | None = None) -> bytes:
    """PNG bytes of a matplotlib figure at ``dpi`` (default: the figure's), with a palette of
    its :data:`PNG_COLOURS` most frequent colours."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image, PngImagePlugin

    canvas = FigureCanvasAgg(figure)
    drawn_dpi = figure.dpi
    if dpi:
        figure.set_dpi(dpi)
    try:
        canvas.draw()
        rgb = np.asarray(canvas.buffer_rgba())[..., :3].astype(np.int32)
    finally:
        figure.set_dpi(drawn_dpi)
    height, width, _ = rgb.shape
    packed = (rgb[..., 0] << 16 | rgb[..., 1] << 8 | rgb[..., 2]).ravel()
    colours, inverse, counts = np.unique(packed, return_inverse=True, return_counts=True)
    unpacked = np.stack([colours >> 16, (colours >> 8) & 255, colours & 255], axis=-1)
    palette = unpacked[np.argsort(-counts, kind="stable")[:PNG_COLOURS]]
    lookup = np.empty(len(colours), dtype=np.uint8)  # each colour's nearest palette entry
    for start in range(0, len(colours), _LUT_CHUNK):
        chunk = unpacked[start : start + _LUT_CHUNK]
        distance = ((chunk[:, None, :] - palette[None, :, :]) ** 2).sum(axis=-1)
        lookup[start : start + _LUT_CHUNK] = distance.argmin(axis=1)
    image = Image.fromarray(lookup[inverse.ravel()].reshape(height, width))
    image.putpalette(palette.astype(np.uint8).tobytes())
    info = PngImagePlugin.PngInfo()
    info.add_text("Software", "noisebench")
    buffer = io.BytesIO()
    image.save(buffer, format="png", pnginfo=info)
    return buffer.getvalue()


# ----------------------------------------------------------------------------- data helpers


def coverage_text(budgets: Sequence[Mapping[str, Any] | None]) -> str:
    """``k = 2`` when every budget has the same coverage factor, else ``k per point``."""
    ks = {b.get("k") for b in budgets if b}
    k = ks.pop() if len(ks) == 1 else None
    return f"k = {k:g}" if isinstance(k, (int, float)) else "k per point"


def nf_error_bars(record: RunRecord) -> tuple[np.ndarray, str]:
    """NF error bars as a (2, n) array of (below, above) distances in dB, and their legend text.

    The expanded uncertainty when every point has a budget with ``U_expanded_db`` (a Monte
    Carlo budget's coverage interval ``monte_carlo.interval_db`` gives asymmetric bars);
    otherwise the standard uncertainty ``u_nf_db`` (k = 1).
    """
    by_freq = record.budgets_by_freq()
    budgets = [by_freq.get(p.freq_hz) for p in record.points]
    if not record.points or not all(
        b and isinstance(b.get("U_expanded_db"), (int, float)) for b in budgets
    ):
        u = np.array([p.u_nf_db for p in record.points], dtype=float)
        return np.vstack([u, u]), "standard uncertainty u (k = 1)"
    bars = np.array(
        [
            _expanded_bar(p.nf_db, b)
            for p, b in zip(record.points, budgets, strict=True)
            if b is not None  # every point has one (checked above)
        ]
    ).T
    return bars, f"expanded uncertainty U ({coverage_text(budgets)})"


def _expanded_bar(nf_db: float, budget: dict[str, Any]) -> tuple[float, float]:
    interval = (budget.get("monte_carlo") or {}).get("interval_db")
    if (
        isinstance(interval, (list, tuple))
        and len(interval) == 2
        and all(isinstance(v, (int, float)) for v in interval)
        and interval[0] <= nf_db <= interval[1]
    ):
        return nf_db - interval[0], interval[1] - nf_db
    return budget["U_expanded_db"], budget["U_expanded_db"]


def gain_error_bars(record: RunRecord) -> tuple[np.ndarray, str]:
    """Gain error bars (2, n) in dB for the points with a gain, and their legend text.

    ``U_gain_db`` of the verdict (``k * u_gain``, what the gain limits were judged with) when
    every such point has one, otherwise ``u_gain_db`` (k = 1; 0 where unknown).
    """
    points = [p for p in record.points if p.gain_db is not None]
    verdicts = record.verdicts_by_freq()
    expanded = [(verdicts.get(p.freq_hz) or {}).get("U_gain_db") for p in points]
    if points and all(isinstance(u, (int, float)) for u in expanded):
        by_freq = record.budgets_by_freq()
        budgets = [by_freq.get(p.freq_hz) for p in points]
        k_text = coverage_text(budgets) if all(budgets) else "k from the verdict"
        u = np.array(expanded, dtype=float)
        return np.vstack([u, u]), f"expanded uncertainty U ({k_text})"
    u = np.array([p.u_gain_db or 0.0 for p in points], dtype=float)
    return np.vstack([u, u]), "standard uncertainty u (k = 1)"


def limit_segments(record: RunRecord, keys: Sequence[str]) -> list[tuple[float, float, float, str]]:
    """``(start_hz, stop_hz, value_db, key)`` per band of ``verdict["limits"]`` having ``keys``."""
    limits = (record.verdict or {}).get("limits") or []
    segments = []
    for band in limits:
        if not isinstance(band, dict):
            continue
        start, stop = band.get("start_hz"), band.get("stop_hz")
        if not (isinstance(start, (int, float)) and isinstance(stop, (int, float))):
            continue
        for key in keys:
            value = band.get(key)
            if isinstance(value, (int, float)) and math.isfinite(value):
                segments.append((float(start), float(stop), float(value), key))
    return segments


def _draw_limits(axes, segments, scale: float, layout: FigureLayout = WIDE) -> None:
    """Black dashed limit lines over their bands, each labelled with its value at its end."""
    labelled: set[str] = set()
    for start, stop, value, key in segments:
        label = None if key in labelled else LIMIT_LABELS.get(key, key)
        labelled.add(key)
        axes.hlines(
            value,
            start / scale,
            stop / scale,
            colors=LIMIT,
            linestyles=(0, (6, 3)),
            linewidth=1.6,
            label=label,
            zorder=3,
        )
        axes.annotate(
            f"{value:g} dB",
            (stop / scale, value),
            xytext=(-2, 3),
            textcoords="offset points",
            ha="right",
            va="bottom",
            fontsize=layout.note_pt,
            color=LIMIT,
        )


def _draw_with_uncertainty(
    axes, freq: np.ndarray, values: np.ndarray, bars: np.ndarray, label: str
) -> None:
    """Values with (below, above) uncertainty: error bars, or a shaded band for dense sweeps."""
    if len(values) <= DENSE_SWEEP_POINTS:
        axes.errorbar(
            freq,
            values,
            yerr=bars,
            color=INK,
            ecolor=INK,
            elinewidth=0.9,
            capsize=2.5,
            marker=".",
            markersize=5,
            linewidth=1.2,
            label=label,
        )
        return
    axes.fill_between(
        freq,
        values - bars[0],
        values + bars[1],
        color=INK,
        alpha=0.22,
        linewidth=0,
        label=label.split(" ± ", 1)[-1],
    )
    axes.plot(freq, values, color=INK, linewidth=1.0, label=label.split(" ± ", 1)[0])


def verdict_words(record: RunRecord) -> np.ndarray:
    """Each point's verdict word (``pass``, ``fail``, ``indeterminate``, ``not_judged``)."""
    verdicts = record.verdicts_by_freq()
    return np.array(
        [str((verdicts.get(p.freq_hz) or {}).get("verdict", "not_judged")) for p in record.points]
    )


def _draw_verdicts(axes, record: RunRecord, freq: np.ndarray, values: np.ndarray) -> None:
    """Mark points by verdict (shape and colour); dense sweeps mark only non-passing points."""
    words = verdict_words(record)
    dense = len(values) > DENSE_SWEEP_POINTS
    for verdict, (colour, marker) in VERDICT_STYLE.items():
        mask = words == verdict
        count = int(mask.sum())
        if not count or (dense and verdict == "pass"):
            continue
        hollow = verdict in HOLLOW_VERDICTS
        size = (16 if dense else 40) * (1.0 if hollow else 1.5)
        axes.scatter(
            freq[mask],
            values[mask],
            s=size,
            marker=marker,
            zorder=4,
            facecolors="none" if hollow else colour,
            edgecolors=colour if hollow else EDGE,
            linewidths=1.3 if hollow else 0.5,
            label=f"{verdict.replace('_', ' ')}: {count} point{'s' * (count != 1)}",
        )


# ----------------------------------------------------------------------------- figures


def nf_figure(record: RunRecord, layout: FigureLayout = WIDE):
    """Figure of NF vs frequency with error bars, limit lines and verdict markers."""
    freq_hz = [p.freq_hz for p in record.points]
    figure, axes, scale = _new_axes(
        _title(record, "Noise figure"), "Noise figure (dB)", freq_hz, layout
    )
    freq = np.array(freq_hz) / scale
    nf = np.array([p.nf_db for p in record.points])
    bars, bar_label = nf_error_bars(record)
    _draw_with_uncertainty(axes, freq, nf, bars, f"NF ± {bar_label}")
    _draw_limits(axes, limit_segments(record, NF_LIMIT_KEYS), scale, layout)
    if record.verdict:
        _draw_verdicts(axes, record, freq, nf)
    _draw_flagged(axes, record, freq, nf + bars[1])
    _legend(axes, layout)
    return figure


def _draw_flagged(axes, record: RunRecord, freq: np.ndarray, tops: np.ndarray) -> None:
    """Mark flagged points (any flag) above their upper bar; the legend counts them."""
    flagged = np.array([bool(p.flags) for p in record.points], dtype=bool)
    count = int(flagged.sum())
    if not count:
        return
    low, high = axes.get_ylim()
    lift = 0.035 * (high - low)
    axes.scatter(
        freq[flagged],
        tops[flagged] + lift,
        s=34,
        marker=FLAG_MARKER,
        facecolors="none",
        edgecolors=EDGE,
        linewidths=1.0,
        zorder=5,
        label=f"flagged (see the points table): {count} point{'s' * (count != 1)}",
    )


def gain_figure(record: RunRecord, layout: FigureLayout = WIDE):
    """Figure of DUT gain vs frequency with uncertainty bars and gain limits, or None."""
    points = [p for p in record.points if p.gain_db is not None]
    if not points:
        return None
    freq_hz = [p.freq_hz for p in points]
    figure, axes, scale = _new_axes(_title(record, "Gain"), "Gain (dB)", freq_hz, layout)
    freq = np.array(freq_hz) / scale
    gain = np.array([p.gain_db for p in points], dtype=float)
    bars, bar_label = gain_error_bars(record)
    if bars.any():
        _draw_with_uncertainty(axes, freq, gain, bars, f"gain ± {bar_label}")
    else:
        axes.plot(freq, gain, color=INK, marker=".", markersize=5, linewidth=1.2, label="gain")
    _draw_limits(axes, limit_segments(record, GAIN_LIMIT_KEYS), scale, layout)
    _legend(axes, layout)
    return figure


def density_series(record: RunRecord) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per density name: (freq_hz, density_dbm_per_hz), skipping non-positive values."""
    names: list[str] = []
    for point in record.points:
        names += [n for n in point.densities_w_per_hz if n not in names]
    series = {}
    for name in names:
        pairs = [
            (p.freq_hz, p.densities_w_per_hz[name])
            for p in record.points
            if p.densities_w_per_hz.get(name, 0.0) > 0
        ]
        if pairs:
            freq, density = np.array(pairs).T
            series[name] = (freq, np.atleast_1d(w_per_hz_to_dbm_per_hz(density)))
    return series


def density_label(name: str) -> str:
    """Legend text of a stored density name (``hot_cal`` -> what was measured, in words)."""
    style = DENSITY_STYLE.get(name)
    return style[0] if style else plain_text(name.replace("_", " "))


def densities_figure(record: RunRecord, layout: FigureLayout = WIDE):
    """Figure of the raw noise densities (dBm/Hz) vs frequency, or None without densities."""
    series = density_series(record)
    if not series:
        return None
    freq_hz = [p.freq_hz for p in record.points]
    figure, axes, scale = _new_axes(
        _title(record, "Noise densities at the analyzer"),
        "Noise density (dBm/Hz)",
        freq_hz,
        layout,
    )
    dense = len(record.points) > DENSE_SWEEP_POINTS
    for index, (name, (freq, dbm_per_hz)) in enumerate(series.items()):
        _, colour, style, marker = DENSITY_STYLE.get(
            name, ("", SERIES[index % len(SERIES)], "-", SERIES_MARKERS[index % len(SERIES)])
        )
        axes.plot(
            freq / scale,
            dbm_per_hz,
            linestyle=style,
            color=colour,
            linewidth=1.1,
            marker="" if dense else marker,
            markersize=3.5,
            label=density_label(name),
        )
    _legend(axes, layout)
    return figure


def budget_series(record: RunRecord) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per contribution name (plus ``combined u_c`` and ``expanded U``): (freq_hz, |c_i u_i| dB)."""
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


TOTALS = ("combined u_c", "expanded U")


def largest_contributions(
    series: dict[str, tuple[np.ndarray, np.ndarray]], keep: int = BUDGET_LINES
) -> tuple[list[str], list[str]]:
    """Contribution names split into the ``keep`` largest (by their maximum) and the rest.

    When only one would be left over, it is kept as well (a group of one says nothing).
    """
    names = sorted(
        (n for n in series if n not in TOTALS),
        key=lambda n: float(np.max(series[n][1])),
        reverse=True,
    )
    if len(names) <= keep + 1:
        return names, []
    return names[:keep], names[keep:]


def coincident_with(
    series: dict[str, tuple[np.ndarray, np.ndarray]], earlier: Sequence[str], name: str
) -> str | None:
    """The first of ``earlier`` whose line lies on ``name``'s (same points, values within
    0.1 % of the larger), so the later one is drawn dashed and hollow and says so."""
    freq, value = series[name]
    for other in earlier:
        other_freq, other_value = series[other]
        if other_freq.shape == freq.shape and np.allclose(other_freq, freq):
            if np.allclose(other_value, value, rtol=1e-3, atol=0):
                return other
    return None


def rss_series(
    series: dict[str, tuple[np.ndarray, np.ndarray]], names: Sequence[str]
) -> tuple[np.ndarray, np.ndarray]:
    """Root sum of squares of the named contributions per frequency: (freq_hz, dB)."""
    squares: dict[float, float] = {}
    for name in names:
        for freq, value in zip(*series[name], strict=True):
            squares[float(freq)] = squares.get(float(freq), 0.0) + float(value) ** 2
    freq = np.array(sorted(squares))
    return freq, np.sqrt([squares[f] for f in freq])


def budget_figure(record: RunRecord, layout: FigureLayout = WIDE):
    """Figure of the uncertainty contributions vs frequency, or None without budgets."""
    series = budget_series(record)
    if not series:
        return None
    freq_hz = [b["freq_hz"] for b in record.budgets if isinstance(b.get("freq_hz"), (int, float))]
    figure, axes, scale = _new_axes(
        _title(record, "Uncertainty budget"), "Uncertainty of NF (dB)", freq_hz, layout
    )
    shown, rest = largest_contributions(series)
    dense = len(freq_hz) > DENSE_SWEEP_POINTS
    for index, name in enumerate(shown):
        freq, value = series[name]
        same = coincident_with(series, shown[:index], name)
        label = plain_text(name) + (f" (equal to {plain_text(same)})" if same else "")
        axes.plot(
            freq / scale,
            value,
            color=SERIES[index % len(SERIES)],
            linewidth=1.1 if not same else 1.6,
            linestyle=COINCIDENT_STYLE if same else "-" if index < len(SERIES) else ":",
            marker="" if dense else SERIES_MARKERS[index % len(SERIES_MARKERS)],
            markersize=3.5 if not same else 6.0,
            markerfacecolor="none" if same else None,
            label=label,
        )
    if rest:
        freq, value = rss_series(series, rest)
        axes.plot(
            freq / scale,
            value,
            color=OTHER,
            linewidth=1.1,
            linestyle=":",
            label=f"{len(rest)} other inputs combined (RSS)",
        )
    budgets = [b for b in record.budgets if isinstance(b.get("freq_hz"), (int, float))]
    for name, style, label in (
        ("combined u_c", "-", "combined standard uncertainty u_c (k = 1)"),
        ("expanded U", (0, (5, 2)), f"expanded uncertainty U ({coverage_text(budgets)})"),
    ):
        if name in series:
            freq, value = series[name]
            axes.plot(freq / scale, value, color=EDGE, linewidth=2.0, linestyle=style, label=label)
    axes.set_ylim(bottom=0)
    _legend(axes, layout, title=r"contributions $|c_i\,u(x_i)|$ are standard uncertainties (k = 1)")
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


def render_figures(
    record: RunRecord, dpi: int | None = None, *, layout: FigureLayout = WIDE
) -> dict[str, bytes]:
    """All figures that apply to ``record`` as PNG bytes, keyed by file name (in memory),
    drawn for ``layout`` at ``dpi`` (default: the layout's)."""
    if not record.points:
        logger.info("run %s has no points: no figures", record.info.run_id)
        return {}
    figures = {}
    for name, make in FIGURES:
        figure = make(record, layout)
        if figure is not None:
            figures[name] = to_png(figure, dpi or layout.dpi)
    return figures


def narrow_name(name: str) -> str:
    """The key (and path below ``plots/``) of a figure's narrow rendering."""
    return f"{NARROW_DIR}/{name}"


def render_report_figures(record: RunRecord, dpi: int | None = None) -> dict[str, bytes]:
    """The figures of the report: the wide ones (at ``dpi``, default the layout's), then
    their narrow renderings keyed ``narrow/<name>``."""
    figures = render_figures(record, dpi)
    if figures:
        narrow = render_figures(record, layout=NARROW)
        figures.update({narrow_name(name): png for name, png in narrow.items()})
    return figures


def plot_run(record: RunRecord, folder: Path, *, dpi: int = DEFAULT_DPI) -> list[Path]:
    """Write the run's figures to ``<folder>/plots/*.png`` (``folder`` is the run folder), and
    their phone renderings (:data:`NARROW`) to ``<folder>/plots/narrow/*.png``.

    ``dpi`` is the wide figures'. Returns the written paths, the wide figures first (none when
    the run has no points).
    """
    if not isinstance(record, RunRecord):
        raise InputError(
            "record",
            f"must be a RunRecord (got {type(record).__name__})",
            fix="load it with noisebench.results.store.load_run",
        )
    out = Path(folder) / PLOTS_DIR
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(
            "folder", f"cannot create {out}: {exc.strerror or exc}", fix="choose a writable folder"
        ) from exc
    figures = render_report_figures(record, dpi)
    if figures:
        try:
            (out / NARROW_DIR).mkdir(exist_ok=True)
        except OSError as exc:
            raise InputError(
                "folder",
                f"cannot create {out / NARROW_DIR}: {exc.strerror or exc}",
                fix="choose a writable folder",
            ) from exc
    paths = []
    for name, png in figures.items():
        path = out / name
        path.write_bytes(png)
        paths.append(path)
    logger.info("wrote %d figures to %s", len(paths), out)
    return paths


__all__ = [
    "LAYOUTS",
    "NARROW",
    "NARROW_DIR",
    "VERDICT_STYLE",
    "WIDE",
    "FigureLayout",
    "VERDICT_SYMBOL",
    "budget_figure",
    "coverage_text",
    "densities_figure",
    "density_label",
    "density_series",
    "frequency_scale",
    "gain_error_bars",
    "gain_figure",
    "largest_contributions",
    "limit_segments",
    "log_tick_subs",
    "narrow_name",
    "nf_error_bars",
    "nf_figure",
    "plain_number",
    "plain_text",
    "plot_run",
    "render_figures",
    "render_report_figures",
    "rss_series",
    "to_png",
    "use_log_axis",
    "verdict_words",
    "wrap_title",
]
