"""Figures and the self-contained HTML report of a run."""

from __future__ import annotations

import base64
import html
import io
import itertools
import json
import math
import re
import struct
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import scipy.constants
from markupsafe import escape

from noisebench.errors import InputError
from noisebench.results.plots import (
    DEFAULT_DPI,
    DENSE_SWEEP_POINTS,
    DENSITY_STYLE,
    FIGURE_SIZE_IN,
    FIGURES,
    LAYOUTS,
    LIMIT,
    NARROW,
    NARROW_DIR,
    VERDICT_STYLE,
    VERDICT_SYMBOL,
    WIDE,
    budget_figure,
    budget_series,
    coincident_with,
    densities_figure,
    density_series,
    frequency_scale,
    gain_error_bars,
    gain_figure,
    largest_contributions,
    limit_segments,
    log_tick_subs,
    nf_error_bars,
    nf_figure,
    plain_number,
    plot_run,
    render_figures,
    rss_series,
    to_png,
    use_log_axis,
    wrap_title,
)
from noisebench.results.report import (
    DETAIL_ROWS_MAX,
    SAFETY_NOTE,
    label,
    render_report,
    render_run,
    verdict_html,
    write_report,
)
from noisebench.results.store import FLAG_DESCRIPTIONS, RunInfo, RunRecord, RunWriter, load_run
from noisebench.science.point import Method, PointFlag, PointResult

T0_K = 290.0
KT0_W_PER_HZ = scipy.constants.k * T0_K  # docs/references.md §1 (scipy.constants)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
NASTY = '<script>alert("x")</script> & co'
CONTRIBUTION_NAMES = ("ENR", "jitter <hot>")


def make_record(
    n: int = 12,
    *,
    start_hz: float = 10e6,
    stop_hz: float = 6e9,
    budgets: bool = True,
    verdict: bool = True,
    gain: bool = True,
    dut_id: str = "LNA-7",
    contributions: int = 2,
) -> RunRecord:
    freqs = np.geomspace(start_hz, stop_hz, n)
    points, budget_list, verdicts = [], [], []
    for i, freq in enumerate(freqs):
        nf_db = 1.0 + 0.1 * i
        points.append(
            PointResult(
                freq_hz=float(freq),
                method=Method.Y_FACTOR,
                nf_db=nf_db,
                te_k=T0_K * (10 ** (nf_db / 10) - 1),
                u_nf_db=0.03 + 0.001 * i,
                u_te_k=2.0,
                gain_db=(20.0 - 0.1 * i) if gain else None,
                u_gain_db=0.04 if gain else None,
                y_db=12.0,
                enr_db=15.0,
                floor_margin_db=16.0,
                floor_correction_db=0.12,
                averages=32,
                instrument_time_s=0.1,
                densities_w_per_hz={"hot": KT0_W_PER_HZ * 3000, "cold": KT0_W_PER_HZ},
                flags=[PointFlag.EXCESS_SCATTER] if i == 3 else [],
            )
        )
        U = 0.2 + 0.01 * i
        lines = [
            {
                "name": "ENR",
                "u": 0.1,
                "unit": "dB",
                "sensitivity": 0.99,
                "contribution_db": 0.099,
                "distribution": "normal",
            },
            {
                "name": "jitter <hot>",
                "u": 0.01,
                "unit": "1",
                "sensitivity": -4.6,
                "contribution_db": -0.046,
                "distribution": "normal",
            },
        ]
        lines += [
            {
                "name": f"small term {j}",
                "u": 0.01,
                "unit": "dB",
                "sensitivity": 1.0,
                "contribution_db": 0.002 * (j + 1) * (1 + 0.01 * i),
                "distribution": "rectangular",
            }
            for j in range(contributions - 2)
        ]
        budget_list.append(
            {
                "freq_hz": float(freq),
                "contributions": lines,
                "u_combined_db": U / 2,
                "k": 2.0,
                "U_expanded_db": U,
                "method": "gum",
            }
        )
        word = "fail" if nf_db - U > 1.6 else ("pass" if nf_db + U <= 1.6 else "indeterminate")
        verdicts.append(
            {
                "freq_hz": float(freq),
                "verdict": word,
                "limit": 1.6,
                "U_gain_db": 0.08 if gain else None,
                "checks": [
                    {
                        "quantity": "nf_db",
                        "kind": "max",
                        "limit": 1.6,
                        "value": nf_db,
                        "U": U,
                        "verdict": word,
                        "band": 0,
                        "margin_db": 1.6 - nf_db,
                        "note": None,
                    }
                ],
            }
        )
    info = RunInfo(
        run_id="run-42",
        method=Method.Y_FACTOR,
        dut_id=dut_id,
        operator="kim & lee",
        identities={"analyzer": "Example,SA<1>,0001,1.0"},
        versions={"noisebench": "0.1.0", "numpy": np.__version__},
        calibration={
            "measured_at": "2025-01-01T00:00:00Z",
            "settings": {"rbw_hz": 1e6, "detector": "rms"},
            "points": [{"freq_hz": 1e9, "te2_k": 4306.19}],
        },
        applied_settings=[{"rbw_hz": 1e6, "detector": "rms", "averages": 32}],
        plan={"dut": {"id": dut_id}},
        notes={"fixture": "<b>bold</b>"},
    )
    return RunRecord(
        info=info,
        points=points,
        budgets=budget_list if budgets else [],
        verdict={
            "unit": "fail",
            "rule": "guarded",
            "points": verdicts,
            "limits": [
                {"start_hz": start_hz, "stop_hz": stop_hz, "nf_max_db": 1.6, "gain_min_db": 18.0}
            ],
        }
        if verdict
        else None,
    )


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG specification, ISO/IEC 15948)."""
    assert data[:8] == PNG_SIGNATURE and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def colour_pixels(data: bytes, hex_colour: str) -> int:
    """Pixels within 6/255 of ``hex_colour`` in a PNG."""
    import matplotlib.image
    from matplotlib.colors import to_rgb

    rgb = matplotlib.image.imread(io.BytesIO(data), format="png")[..., :3]
    return int(np.all(np.abs(rgb - np.array(to_rgb(hex_colour))) < 6 / 255, axis=-1).sum())


def tick_labels(axes, which: str = "major") -> list[str]:
    """The x tick labels matplotlib shows inside the view (after a draw)."""
    to_png(axes.figure, dpi=30)
    low, high = sorted(axes.get_xlim())
    ticks = axes.xaxis.get_major_ticks() if which == "major" else axes.xaxis.get_minor_ticks()
    return [
        t.label1.get_text() for t in ticks if low <= t.get_loc() <= high and t.label1.get_visible()
    ]


@pytest.fixture(scope="module")
def record() -> RunRecord:
    return make_record()


@pytest.fixture(scope="module")
def plot_files(record, tmp_path_factory) -> list[Path]:
    return plot_run(record, tmp_path_factory.mktemp("run"))


# ----------------------------------------------------------------------------- figures


def test_plot_run_writes_valid_pngs_of_sensible_size(plot_files):
    names = ["noise_figure.png", "gain.png", "densities.png", "uncertainty.png"]
    assert [p.name for p in plot_files] == names + names  # the wide ones, then the narrow
    assert [p.parent.name for p in plot_files] == ["plots"] * 4 + [NARROW_DIR] * 4
    assert plot_files[4].parent.parent.name == "plots"
    assert WIDE.size_in == FIGURE_SIZE_IN and WIDE.dpi == DEFAULT_DPI
    for path in plot_files:
        data = path.read_bytes()
        layout = NARROW if path.parent.name == NARROW_DIR else WIDE
        width, height = (s * layout.dpi for s in layout.size_in)
        # a fractional pixel count is rounded by some matplotlib versions and truncated by
        # others (3.10 vs 3.11): either whole number is the width asked for; the height grows
        # by the legend below the axes (a few rows of 8-pt text; one column of them, narrow)
        got_width, got_height = png_size(data)
        assert got_width in (math.floor(width), math.ceil(width)), (got_width, width)
        assert height - 1 <= got_height <= 2.0 * height, (got_height, height)
        assert 5_000 < len(data) < 1_000_000
        import matplotlib.image

        pixels = matplotlib.image.imread(path)
        assert pixels[..., :3].std() > 0.05  # something drawn, not a blank canvas


def test_all_figures_share_one_axes_frame_so_frequency_axes_line_up(record):
    def frame_in(figure):
        """Axes left, width, height and distance from the top, inches: the same in every
        figure, whatever height its legend below adds."""
        width_in, height_in = figure.get_size_inches()
        left, bottom, width, height = figure.axes[0].get_position().bounds
        top = (1.0 - bottom - height) * height_in
        return tuple(np.round([left * width_in, width * width_in, height * height_in, top], 6))

    frames = {
        frame_in(figure)
        for figure in (
            nf_figure(record),
            gain_figure(record),
            densities_figure(record),
            budget_figure(record),
        )
    }
    assert len(frames) == 1


def test_nf_plot_shows_limit_lines_and_verdict_markers_only_when_present(plot_files, record):
    assert colour_pixels(plot_files[0].read_bytes(), VERDICT_STYLE["fail"][0]) > 50
    axes = nf_figure(record).axes[0]
    (limit,) = [c for c in axes.collections if c.get_label() == "NF limit (max)"]
    assert np.allclose(
        limit.get_colors()[0][:3], [int(LIMIT[i : i + 2], 16) / 255 for i in (1, 3, 5)]
    )
    assert limit.get_linestyles()[0][1] is not None  # dashed, not solid
    assert "1.6 dB" in [t.get_text() for t in axes.texts]  # the value beside its line
    bare = nf_figure(make_record(verdict=False)).axes[0]
    assert not [c for c in bare.collections if "limit" in str(c.get_label())]
    assert colour_pixels(to_png(bare.figure), VERDICT_STYLE["fail"][0]) == 0
    assert not bare.texts


def test_verdict_markers_differ_in_shape_and_legend_counts_points(record):
    markers = [marker for _, marker in VERDICT_STYLE.values()]
    assert len(set(markers)) == len(markers)
    assert len(set(VERDICT_SYMBOL.values())) == len(VERDICT_SYMBOL)
    axes = nf_figure(record).axes[0]
    labels = axes.get_legend_handles_labels()[1]
    words = [str(v["verdict"]) for v in record.verdict["points"]]
    for word in ("pass", "fail", "indeterminate"):
        count = words.count(word)
        assert f"{word}: {count} point{'s' * (count != 1)}" in labels
    legend = [t.get_text() for t in axes.get_legend().get_texts()]
    assert legend[0].startswith("NF ±") and legend[1] == "NF limit (max)"  # data, limit, verdicts


# Machado, Oliveira & Fernandes (2009), "A physiologically-based model for simulation of
# color vision deficiency", IEEE TVCG 15(6): severity-1.0 matrices on linear sRGB (the
# paper's supplementary data, as also shipped by colorspacious).
CVD_MATRICES = {
    "normal": np.eye(3),
    "protanopia": np.array(
        [
            [0.152286, 1.052583, -0.204868],
            [0.114503, 0.786281, 0.099216],
            [-0.003882, -0.048116, 1.051998],
        ]
    ),
    "deuteranopia": np.array(
        [
            [0.367322, 0.860646, -0.227968],
            [0.280085, 0.672501, 0.047413],
            [-0.011820, 0.042940, 0.968881],
        ]
    ),
    "tritanopia": np.array(
        [
            [1.255528, -0.076749, -0.178779],
            [-0.078411, 0.930809, 0.147602],
            [0.004733, 0.691367, 0.303900],
        ]
    ),
}
# IEC 61966-2-1 (sRGB): linear RGB -> CIE XYZ, D65 white
SRGB_TO_XYZ = np.array(
    [[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]]
)
CATEGORICAL_DELTA_E = 20.0  # common practice: small marks need far more than the ~2.3 JND


def _linear(hex_colour: str) -> np.ndarray:
    srgb = np.array([int(hex_colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])
    return np.where(srgb <= 0.04045, srgb / 12.92, ((srgb + 0.055) / 1.055) ** 2.4)  # IEC 61966-2-1


def _lab(linear_rgb: np.ndarray) -> np.ndarray:
    """CIE 1976 L*a*b* (D65) of a linear-sRGB colour."""
    xyz = SRGB_TO_XYZ @ np.clip(linear_rgb, 0, 1) / (SRGB_TO_XYZ @ np.ones(3))
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def _min_delta_e(colours: dict[str, str]) -> float:
    return min(
        float(np.linalg.norm(_lab(m @ _linear(a)) - _lab(m @ _linear(b))))
        for m in CVD_MATRICES.values()
        for a, b in itertools.combinations(colours.values(), 2)
    )


def test_verdict_colours_stay_apart_for_colour_blind_readers():
    colours = {word: colour for word, (colour, _) in VERDICT_STYLE.items()}
    assert _min_delta_e(colours) >= CATEGORICAL_DELTA_E
    # the palette this replaced (green pass, red fail) fails the same check under protanopia
    assert _min_delta_e({"pass": "#2e7d4f", "fail": "#b3261e"}) < CATEGORICAL_DELTA_E


def test_verdict_text_colours_have_readable_contrast():
    def luminance(hex_colour: str) -> float:  # WCAG 2.1 relative luminance
        return float(np.array([0.2126, 0.7152, 0.0722]) @ _linear(hex_colour))

    def contrast(a: str, b: str) -> float:  # WCAG 2.1 contrast ratio
        high, low = sorted((luminance(a), luminance(b)), reverse=True)
        return (high + 0.05) / (low + 0.05)

    # report: pass / not judged as coloured text on white, fail as white on red,
    # indeterminate as dark ink on amber; WCAG 2.1 AA asks >= 4.5 for normal text
    assert contrast(VERDICT_STYLE["pass"][0], "#ffffff") >= 4.5
    assert contrast(VERDICT_STYLE["not_judged"][0], "#ffffff") >= 4.5
    assert contrast(VERDICT_STYLE["fail"][0], "#ffffff") >= 4.5
    assert contrast(VERDICT_STYLE["indeterminate"][0], "#1f2a36") >= 4.5


def test_nf_error_bars_are_expanded_when_budgets_exist(record):
    figure = nf_figure(record)
    axes = figure.axes[0]
    bars = axes.containers[0].lines[2][0].get_segments()
    half_widths = [(seg[1][1] - seg[0][1]) / 2 for seg in bars]
    expected = [b["U_expanded_db"] for b in record.budgets]
    assert np.allclose(half_widths, expected, rtol=0, atol=1e-12)
    assert "NF ± expanded uncertainty U (k = 2)" in axes.get_legend_handles_labels()[1]
    bars, label_text = nf_error_bars(make_record(budgets=False))
    assert label_text == "standard uncertainty u (k = 1)"
    expected_u = [p.u_nf_db for p in make_record(budgets=False).points]
    assert list(bars[0]) == expected_u and list(bars[1]) == expected_u


def test_legend_never_wraps_inside_the_coverage_factor(record):
    legend = [t.get_text() for t in nf_figure(record).axes[0].get_legend().get_texts()]
    (text,) = [t for t in legend if t.startswith("NF ±")]
    assert "k\u00a0=\u00a02" in text  # never broken between k, = and 2
    from noisebench.results.plots import _wrap

    narrow = _wrap("NF ± expanded uncertainty U (k = 2)", 20)
    assert "\n" in narrow and "k\u00a0=\u00a02" in narrow


def test_gain_bars_are_what_the_gain_limits_were_judged_with(record):
    bars, text = gain_error_bars(record)
    assert np.allclose(bars, 0.08) and text == "expanded uncertainty U (k = 2)"
    axes = gain_figure(record).axes[0]
    segments = axes.containers[0].lines[2][0].get_segments()
    assert np.allclose([(s[1][1] - s[0][1]) / 2 for s in segments], 0.08)
    assert "gain ± expanded uncertainty U (k = 2)" in axes.get_legend_handles_labels()[1]
    bars, text = gain_error_bars(make_record(verdict=False))
    assert np.allclose(bars, 0.04) and text == "standard uncertainty u (k = 1)"


def test_monte_carlo_intervals_give_asymmetric_bars(record):
    budgets = [
        {
            **b,
            "method": "monte_carlo",
            "k": 1.9 + 0.01 * i,
            "monte_carlo": {"interval_db": [p.nf_db - 0.1, p.nf_db + 0.3]},
        }
        for i, (b, p) in enumerate(zip(record.budgets, record.points, strict=True))
    ]
    bars, text = nf_error_bars(record.model_copy(update={"budgets": budgets}))
    assert np.allclose(bars[0], 0.1) and np.allclose(bars[1], 0.3)
    assert text == "expanded uncertainty U (k per point)"


def test_dense_sweeps_draw_an_uncertainty_band_and_mark_only_non_passing_points():
    from matplotlib.collections import PolyCollection

    dense = make_record(n=DENSE_SWEEP_POINTS + 1)
    axes = nf_figure(dense).axes[0]
    (band,) = [c for c in axes.collections if isinstance(c, PolyCollection)]
    assert band.get_label() == "expanded uncertainty U (k = 2)"
    low, high = band.get_paths()[0].vertices[:, 1].min(), band.get_paths()[0].vertices[:, 1].max()
    nf = np.array([p.nf_db for p in dense.points])
    U = np.array([b["U_expanded_db"] for b in dense.budgets])
    assert np.isclose(low, (nf - U).min()) and np.isclose(high, (nf + U).max())
    labels = axes.get_legend_handles_labels()[1]
    assert not [t for t in labels if t.startswith("pass")]
    assert [t for t in labels if t.startswith("fail")]
    assert not axes.containers  # no error-bar containers
    sparse = nf_figure(make_record(n=DENSE_SWEEP_POINTS)).axes[0]
    assert len(sparse.containers) == 1
    assert [t for t in sparse.get_legend_handles_labels()[1] if t.startswith("pass")]


def test_partial_budgets_fall_back_to_standard_uncertainty(record):
    partial = record.model_copy(update={"budgets": record.budgets[:-1]})
    bars, text = nf_error_bars(partial)
    assert "k = 1" in text and bars[0][0] == bars[1][0] == record.points[0].u_nf_db


def test_limit_lines_are_drawn_at_their_values_over_their_band(record):
    assert limit_segments(record, ("nf_max_db",)) == [(10e6, 6e9, 1.6, "nf_max_db")]
    axes = nf_figure(record).axes[0]
    scale, unit = frequency_scale([p.freq_hz for p in record.points])
    assert (scale, unit) == (1e6, "MHz")  # 10 MHz .. 6 GHz reads 10 ... 6000 MHz
    (nf_limit,) = [c for c in axes.collections if c.get_label() == "NF limit (max)"]
    (segment,) = nf_limit.get_segments()
    assert np.allclose(segment, [[10e6 / scale, 1.6], [6e9 / scale, 1.6]])
    gain_axes = gain_figure(record).axes[0]
    (gain_limit,) = [c for c in gain_axes.collections if c.get_label() == "gain limit (min)"]
    assert np.allclose(gain_limit.get_segments()[0][:, 1], 18.0)
    assert not [c for c in gain_axes.collections if "NF" in c.get_label()]


def test_frequency_axis_is_logarithmic_beyond_one_decade():
    assert use_log_axis([1e9, 9.99e9]) is False
    assert use_log_axis([1e9, 1.001e10]) is True
    assert nf_figure(make_record(start_hz=10e6, stop_hz=6e9)).axes[0].get_xscale() == "log"
    narrow = nf_figure(make_record(start_hz=1e9, stop_hz=2e9)).axes[0]
    assert narrow.get_xscale() == "linear" and narrow.get_xlabel() == "Frequency (GHz)"


def test_frequency_unit_follows_the_span():
    assert frequency_scale([0.5e9, 6e9]) == (1e9, "GHz")  # log: 0.5 ... 6
    assert frequency_scale([100e6, 18e9]) == (1e9, "GHz")  # log: 0.1 ... 18
    assert frequency_scale([10e6, 6e9]) == (1e6, "MHz")  # log: 10 ... 6000, not 0.01 GHz
    assert frequency_scale([5e6, 900e6]) == (1e6, "MHz")
    assert frequency_scale([1e9, 2e9]) == (1e9, "GHz")  # linear, span 1 GHz
    assert frequency_scale([2.000e9, 2.004e9]) == (1e6, "MHz")  # linear, span 4 MHz
    assert frequency_scale([1.5e9]) == (1e9, "GHz")
    assert frequency_scale([100.0]) == (1.0, "Hz")
    assert frequency_scale([]) == (1.0, "Hz")
    # 10 Hz .. 6 GHz: no unit gives both ends >= 0.1 and < 1e5; the top end wins
    assert frequency_scale([10.0, 6e9]) == (1e6, "MHz")


def test_log_axis_ticks_are_plain_numbers_in_a_1_2_5_sequence():
    axes = nf_figure(make_record(start_hz=0.5e9, stop_hz=6e9)).axes[0]
    assert axes.get_xlabel() == "Frequency (GHz)"
    assert tick_labels(axes) == ["0.5", "1", "2", "5"]
    minor = sorted(t for t in axes.xaxis.get_minorticklocs() if 0.5 <= t <= 6)
    assert np.allclose(minor, [0.6, 0.7, 0.8, 0.9, 3, 4, 6])  # unlabelled minor ticks
    assert set(tick_labels(axes, "minor")) <= {""}
    wide = nf_figure(make_record(start_hz=10e6, stop_hz=6e9)).axes[0]
    assert wide.get_xlabel() == "Frequency (MHz)"
    assert tick_labels(wide) == ["10", "20", "50", "100", "200", "500", "1000", "2000", "5000"]


def test_log_axis_beyond_three_decades_labels_decades_only():
    assert log_tick_subs(1.0, 1e3) == ((1.0, 2.0, 5.0), (3.0, 4.0, 6.0, 7.0, 8.0, 9.0))
    assert log_tick_subs(1.0, 1.01e3)[0] == (1.0,)
    axes = nf_figure(make_record(start_hz=100e3, stop_hz=6e9)).axes[0]
    assert axes.get_xlabel() == "Frequency (MHz)"
    assert tick_labels(axes) == ["0.1", "1", "10", "100", "1000"]


def test_linear_axis_ticks_have_no_offset_or_exponent():
    axes = nf_figure(make_record(start_hz=2.000e9, stop_hz=2.004e9)).axes[0]
    labels = tick_labels(axes)
    assert axes.get_xlabel() == "Frequency (MHz)" and labels
    assert all(re.fullmatch(r"\d+(\.\d+)?", text) for text in labels), labels
    assert 2000.0 <= float(labels[0]) and float(labels[-1]) <= 2004.0
    assert axes.xaxis.get_offset_text().get_text() == ""
    assert len(axes.xaxis.get_minorticklocs()) > len(labels)  # minor ticks between


@pytest.mark.parametrize(
    ("value", "text"),
    [
        (0.5, "0.5"),
        (1.0, "1"),
        (20.0, "20"),
        (5000.0, "5000"),
        (1e6, "1000000"),
        (0.001, "0.001"),
        (0.30000000000000004, "0.3"),
    ],
)
def test_plain_number_never_uses_an_exponent(value, text):
    assert plain_number(value) == text


def test_densities_are_plotted_in_dbm_per_hz_and_named_in_words(record):
    series = density_series(record)
    assert list(series) == ["hot", "cold"]
    freq, cold_dbm_per_hz = series["cold"]
    # docs/references.md §1: kT0 = -173.9752 dBm/Hz, recomputed from scipy.constants
    assert np.allclose(cold_dbm_per_hz, 10 * np.log10(KT0_W_PER_HZ / 1e-3), atol=1e-12)
    assert np.isclose(cold_dbm_per_hz[0], -173.9752, atol=5e-5)
    assert np.allclose(series["hot"][1] - cold_dbm_per_hz, 10 * np.log10(3000))
    assert list(freq) == [p.freq_hz for p in record.points]
    axes = densities_figure(record).axes[0]
    assert axes.get_ylabel() == "Noise density (dBm/Hz)"
    labels = axes.get_legend_handles_labels()[1]
    assert labels == [DENSITY_STYLE["hot"][0], DENSITY_STYLE["cold"][0]]
    assert "hot" in labels[0] and "DUT" in labels[0]


def test_budget_figure_draws_the_largest_terms_and_combines_the_rest():
    many = make_record(contributions=10)
    series = budget_series(many)
    shown, rest = largest_contributions(series)
    assert shown[:2] == list(CONTRIBUTION_NAMES) and len(shown) == 6 and len(rest) == 4
    assert set(rest) == {f"small term {j}" for j in range(4)}
    freq, rss = rss_series(series, rest)
    expected = [
        np.sqrt(sum((0.002 * (j + 1) * (1 + 0.01 * i)) ** 2 for j in range(4)))
        for i in range(len(many.points))
    ]
    assert np.allclose(freq, [p.freq_hz for p in many.points]) and np.allclose(rss, expected)
    axes = budget_figure(many).axes[0]
    labels = axes.get_legend_handles_labels()[1]
    assert "4 other inputs combined (RSS)" in labels
    assert "expanded uncertainty U (k = 2)" in labels
    assert "combined standard uncertainty u_c (k = 1)" in labels
    assert "k = 1" in axes.get_legend().get_title().get_text().replace("\u00a0", " ")
    # one left over is drawn by itself: a group of one says nothing
    assert largest_contributions(budget_series(make_record(contributions=7)))[1] == []


def test_figures_that_do_not_apply_are_left_out(tmp_path):
    no_gain = make_record(gain=False, budgets=False)
    assert gain_figure(no_gain) is None and budget_figure(no_gain) is None
    assert list(render_figures(no_gain, dpi=30)) == ["noise_figure.png", "densities.png"]
    empty = make_record().model_copy(update={"points": [], "budgets": [], "verdict": None})
    assert plot_run(empty, tmp_path) == []
    assert not list((tmp_path / "plots").glob("*.png"))


def test_user_text_cannot_break_the_figure_text():
    # '$x^$' is invalid mathtext: drawn unescaped, matplotlib raises ValueError
    figures = render_figures(make_record(n=3, dut_id="amp $x^$ _rev", budgets=False), dpi=30)
    assert all(png.startswith(PNG_SIGNATURE) for png in figures.values())


def test_plot_run_refuses_what_is_not_a_record(tmp_path):
    with pytest.raises(InputError) as err:
        plot_run({"points": []}, tmp_path)
    assert err.value.field == "record"


# ----------------------------------------------------------------------------- outputs


def _finished_run(folder: Path, record: RunRecord) -> RunRecord:
    writer = RunWriter.create(folder, record.info)
    for point in record.points:
        writer.add_point(point, budget=record.budget_at(point.freq_hz))
    writer.finish(verdict=record.verdict)
    return load_run(folder)


def test_plots_false_draws_nothing_and_the_report_has_no_figures(tmp_path):
    folder = tmp_path / "run"
    _finished_run(folder, make_record(n=4))
    code = (
        "import sys, json\n"
        "from noisebench.results.store import load_run\n"
        "from noisebench.running.sequencer import write_outputs\n"
        f"folder = {str(folder)!r}\n"
        "written = write_outputs(load_run(folder), folder, plots=False, report=True)\n"
        "print(json.dumps(['matplotlib' in sys.modules, [p.name for p in written]]))\n"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120
    )
    imported, written = json.loads(out.stdout.strip().splitlines()[-1])
    assert imported is False and written == ["report.html"]
    assert not (folder / "plots").exists()
    text = (folder / "report.html").read_text(encoding="utf-8")
    assert "<img" not in text and "Figures" not in text and "Points" in text


def test_plots_true_embeds_exactly_the_written_figures(tmp_path):
    from noisebench.running.sequencer import write_outputs

    folder = tmp_path / "run"
    stored = _finished_run(folder, make_record(n=4))
    written = write_outputs(stored, folder, plots=True, report=True)
    pngs = [p for p in written if p.suffix == ".png"]
    assert [p.name for p in written] == [p.name for p in pngs] + ["report.html"]
    tags = parse((folder / "report.html").read_text()).tags
    sources = [a["src"] for t, a in tags if t == "img"] + [
        a["srcset"] for t, a in tags if t == "source"
    ]
    assert [base64.b64decode(s.split(",", 1)[1]) for s in sources] == [p.read_bytes() for p in pngs]


# ----------------------------------------------------------------------------- report


class TagCollector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def parse(text: str) -> TagCollector:
    parser = TagCollector()
    parser.feed(text)
    return parser


SAFE_TAGS = {
    "picture",
    "source",
    "html",
    "head",
    "meta",
    "title",
    "style",
    "body",
    "header",
    "h1",
    "h2",
    "h3",
    "p",
    "table",
    "thead",
    "tbody",
    "tr",
    "th",
    "td",
    "div",
    "span",
    "ul",
    "li",
    "strong",
    "figure",
    "img",
    "figcaption",
    "details",
    "summary",
    "pre",
    "footer",
    "nav",
    "a",
}


def table_after(text: str, marker: str) -> list[list[str]]:
    """Rows (header first) of the first table after ``marker``, as cell texts."""
    chunk = text.split(marker, 1)[1].split("</table>", 1)[0]
    rows = []
    for row in chunk.split("<tr>")[1:]:
        cells = re.findall(r"<t[hd][^>]*>(.*?)</t[hd]>", row, flags=re.S)
        rows.append([html.unescape(re.sub(r"<[^>]+>", "", c)).strip() for c in cells])
    return rows


def test_report_is_one_self_contained_file(record, plot_files, tmp_path):
    path = write_report(record, tmp_path / "report.html", plots=plot_files)
    text = path.read_text(encoding="utf-8")
    parsed = parse(text)
    assert {tag for tag, _ in parsed.tags} <= SAFE_TAGS  # no script, link, iframe, object
    images = [attrs["src"] for tag, attrs in parsed.tags if tag == "img"]
    narrow = [attrs["srcset"] for tag, attrs in parsed.tags if tag == "source"]
    assert len(images) == len(narrow) == len(plot_files) // 2  # each figure in two renderings
    for uri, png_path in zip(images + narrow, plot_files, strict=True):
        prefix = "data:image/png;base64,"
        assert uri.startswith(prefix)
        assert base64.b64decode(uri[len(prefix) :]) == png_path.read_bytes()
    assert not any(key.startswith("on") for _, attrs in parsed.tags for key in attrs)
    links = [attrs["href"] for tag, attrs in parsed.tags if "href" in attrs]
    ids = {attrs["id"] for _, attrs in parsed.tags if "id" in attrs}
    assert links and all(link.startswith("#") and link[1:] in ids for link in links)
    assert "http://" not in text and "https://" not in text and "url(" not in text


def test_report_opens_with_how_to_read_it(record):
    text = render_report(record, {})
    (howto,) = re.findall(r'<p class="howto">(.*?)</p>', text, flags=re.S)
    words = html.unescape(re.sub(r"<[^>]+>", "", howto))
    assert words.startswith("How to read this report.")
    assert "T0 = 290 K" in words and "U is the expanded uncertainty (k = 2)" in words
    assert "u stat." in words and "guarded" in words and "The NF error bars are U." in words
    for word in ("pass", "fail", "indeterminate"):
        assert f"{VERDICT_SYMBOL[word]} {word}" in words
    bare = render_report(make_record(budgets=False, verdict=False), {})
    words = html.unescape(
        re.sub(r"<[^>]+>", "", bare.split('<p class="howto">')[1].split("</p>")[0])
    )
    assert "no full budget" in words and "Decision rule" not in words
    partial = render_report(record.model_copy(update={"budgets": record.budgets[:-1]}), {})
    assert "The NF error bars are u stat. (k = 1): not every point has a budget." in partial


def test_report_without_plots_argument_renders_figures_in_memory(record, tmp_path):
    text = write_report(record, tmp_path).read_text(encoding="utf-8")  # a folder: report.html
    assert (tmp_path / "report.html").exists()
    sources = [a["src"] for t, a in parse(text).tags if t == "img"]
    assert len(sources) == 4
    assert all(base64.b64decode(s.split(",", 1)[1]).startswith(PNG_SIGNATURE) for s in sources)


def test_report_lists_every_point_with_units_on_every_column(record):
    text = render_report(record, {})
    rows = table_after(text, '<table class="grid points">')
    header, body = rows[0], rows[1:]
    assert len(body) == len(record.points)
    unitless = {"Averages", "Verdict", "Flags"}
    assert all(h in unitless or re.search(r"\((MHz|dB|K|s)\b", h) for h in header), header
    column = {h: [r[i] for r in body] for i, h in enumerate(header)}
    # one precision: at most 7 significant digits of the top frequency (6000.000 MHz)
    assert column["Frequency (MHz)"] == [f"{p.freq_hz / 1e6:.3f}" for p in record.points]
    assert column["NF (dB)"] == [f"{p.nf_db:.3f}" for p in record.points]
    assert column["Te (K)"] == [f"{p.te_k:.1f}" for p in record.points]
    assert column["U (dB, k\u00a0=\u00a02)"] == [
        f"{b['U_expanded_db']:.3f}" for b in record.budgets
    ]
    assert column["u stat. (dB, k\u00a0=\u00a01)"] == [f"{p.u_nf_db:.3f}" for p in record.points]
    assert column["U gain (dB)"] == ["0.080"] * len(record.points)  # what the limits used
    assert column["NF margin (dB)"] == [f"{1.6 - p.nf_db:+.3f}" for p in record.points]
    assert column["2nd-stage corr. (dB)"] == ["0.120"] * len(record.points)


def _points_at(freqs_hz) -> RunRecord:
    base = make_record(n=len(freqs_hz), verdict=False, budgets=False)
    points = [
        p.model_copy(update={"freq_hz": f}) for p, f in zip(base.points, freqs_hz, strict=True)
    ]
    return base.model_copy(update={"points": points})


def test_frequency_column_uses_one_unit_and_one_precision():
    rows = table_after(
        render_report(_points_at([1.0e9, 1.25e9, 1.5e9, 2.0e9]), {}), '<table class="grid points">'
    )
    assert rows[0][0] == "Frequency (GHz)"
    assert [r[0] for r in rows[1:]] == ["1.00", "1.25", "1.50", "2.00"]
    # irrational (log-spaced) frequencies: 7 significant digits of the top one, no more
    log_spaced = np.geomspace(1e9, 1.6e9, 4)
    rows = table_after(render_report(_points_at(log_spaced), {}), '<table class="grid points">')
    assert [r[0] for r in rows[1:]] == [f"{f / 1e9:.6f}" for f in log_spaced]


def test_verdicts_read_as_symbol_and_word(record):
    for word in ("pass", "fail", "indeterminate", "not_judged"):
        cell = verdict_html(word)
        assert f'class="vt v-{word}"' in cell
        assert f"{VERDICT_SYMBOL[word]} {word.replace('_', ' ')}" in html.unescape(cell)
    assert "not judged" in html.unescape(verdict_html(None))
    text = render_report(record, {})
    assert 'class="verdict v-fail"' in text and f"{VERDICT_SYMBOL['fail']} FAIL" in text
    rows = table_after(text, '<table class="grid points">')
    verdicts = [r[rows[0].index("Verdict")] for r in rows[1:]]
    assert verdicts == [
        f"{VERDICT_SYMBOL[v['verdict']]} {v['verdict']}" for v in record.verdict["points"]
    ]
    css_names = {"pass": "pass", "fail": "fail", "indeterminate": "indet", "not_judged": "nj"}
    for word, (colour, _) in VERDICT_STYLE.items():  # the figures' colours, not a second set
        assert f"--{css_names[word]}:{colour}" in text


def test_flags_are_explained_in_words_before_the_table(record):
    text = render_report(record, {})
    legend = text.index("Flags: what the codes")
    assert legend < text.index('<table class="grid points">')
    rows = table_after(text[legend:], "<table")
    assert rows[1] == [
        PointFlag.EXCESS_SCATTER.value,
        "1",
        FLAG_DESCRIPTIONS[PointFlag.EXCESS_SCATTER],
    ]
    assert 'title="' + str(escape(FLAG_DESCRIPTIONS[PointFlag.EXCESS_SCATTER])) in text


def test_report_escapes_every_string(tmp_path):
    nasty = make_record(dut_id=NASTY)
    nasty.warnings.append("line 3: <incomplete>")
    text = render_report(nasty, {})
    assert "<script>" not in text and "<b>bold</b>" not in text and "<incomplete>" not in text
    assert str(escape(NASTY)) in text  # the template engine's own escaping
    assert "kim &amp; lee" in text and "Example,SA&lt;1&gt;,0001,1.0" in text
    assert "jitter &lt;hot&gt;" in text and "&lt;b&gt;bold&lt;/b&gt;" in text
    assert {tag for tag, _ in parse(text).tags} <= SAFE_TAGS


def test_report_summary_verdict_flags_budget_calibration_and_safety(record):
    text = render_report(record, {})
    body = " ".join(parse(text).text)
    assert "LNA-7" in body and "y-factor method" in body and "run-42" in body
    assert 'class="verdict v-fail"' in text and "FAIL" in body
    lowest, highest = record.points[0], record.points[-1]
    assert f"min {lowest.nf_db:.3f} dB" in body and f"max {highest.nf_db:.3f} dB" in body
    margins = [1.6 - p.nf_db for p in record.points]
    assert f"{min(margins):+.3f} dB at 6\u00a0GHz" in text  # smallest NF margin, signed
    assert "Flagged points" in body and "1 of 12" in body
    U = [b["U_expanded_db"] for b in record.budgets]
    assert f"{min(U):.3f} to {max(U):.3f} dB" in body
    assert "Uncertainty budget" in body and "ENR (+0.0990 dB)" in body
    assert "Calibration" in body and "4306.19" in body
    assert "numpy" in body and np.__version__ in body
    for line in SAFETY_NOTE:
        assert str(escape(line)) in text


def test_budget_section_summarises_the_sweep_and_details_the_worst_point(record):
    text = render_report(record, {})
    section = text.split('<h2 id="budget">')[1].split("<h2")[0]
    sweep = table_after(section, "<h3>Over the sweep</h3>")
    assert sweep[0][:2] == ["Input quantity", "Distribution"]
    assert [r[0] for r in sweep[1:]] == list(CONTRIBUTION_NAMES)  # largest first
    shares = [100 * 0.099**2 / (b["u_combined_db"]) ** 2 for b in record.budgets]
    assert sweep[1][-1] == f"{min(shares):.1f} to {max(shares):.1f}"
    worst = max(record.budgets, key=lambda b: b["U_expanded_db"])
    assert "At 6\u00a0GHz, the point with the largest U" in section
    at = table_after(section, "the point with the largest U")
    assert at[1][:3] == ["ENR", "normal", "0.1"] and at[1][-2] == "+0.0990"
    assert at[-2][0] == "combined standard uncertainty u_c"
    assert at[-2][-2] == f"{worst['u_combined_db']:.4f}"
    assert at[-1][0] == "expanded uncertainty U (k = 2)"
    assert at[-1][-2] == f"{worst['U_expanded_db']:.4f}"
    assert "Contributions cᵢ·u(xᵢ) per frequency (12 frequencies" in section


def test_report_budget_shows_distribution_omitted_terms_and_monte_carlo(record):
    budgets = [
        {
            **b,
            "omitted": ["mismatch <no |Gamma|>"],
            "method": "monte_carlo",
            "monte_carlo": {
                "trials": 100000,
                "coverage": 0.95,
                "gum_validated": True,
                "interval_db": [p.nf_db - 0.2, p.nf_db + 0.25],
            },
            "contributions": [{**c, "distribution": "u_shaped"} for c in b["contributions"]],
        }
        for b, p in zip(record.budgets, record.points, strict=True)
    ]
    text = render_report(record.model_copy(update={"budgets": budgets}), {})
    assert "<th>Distribution</th>" in text and "<td>U-shaped (arcsine)</td>" in text
    assert "Not included (no data): mismatch &lt;no |Gamma|&gt;." in text
    assert text.count("Not included (no data)") == 1  # once, not per point
    assert "Monte Carlo propagation (JCGM 101:2008), 100000 trials, 95 % coverage" in text
    assert "validated at 12 of 12 points" in text
    p0 = record.points[0]
    assert f"{p0.nf_db - 0.2:.3f} to {p0.nf_db + 0.25:.3f}" in text  # the MC interval column


def _big_record(n: int) -> RunRecord:
    """A y-factor-like run: 12 budget terms and one calibration entry per point."""
    base = make_record(n=n, contributions=12, start_hz=0.5e9, stop_hz=6e9)
    entries = [
        {
            "kind": "system",
            "freqs_hz": [p.freq_hz],
            "measured_at": f"2025-01-01T00:{i // 60 % 60:02d}:{i % 60:02d}Z",
            "settings": {
                "rbw_hz": 1e6,
                "rbw_filter": {"kind": "gaussian"},
                "detector": "rms",
                "averaging_scale": "power",
                "averages": 4 + i % 7,
                "attenuation_db": 0.0,
                "preamp": False,
            },
            "cold_temperature_k": 296.5,
            "instrument_time_s": 0.25,
            "summary": [
                {
                    "freq_hz": p.freq_hz,
                    "system_nf_db": 12.0 + 0.001 * i,
                    "system_te_k": 4300.0 + i,
                    "y_db": 4.7,
                    "enr_db": 15.0,
                    "averages": 4 + i % 7,
                }
            ],
        }
        for i, p in enumerate(base.points)
    ]
    info = base.info.model_copy(update={"calibration": {"entries": entries}})
    return base.model_copy(update={"info": info})


def test_a_1001_point_report_stays_small_and_leaves_details_to_results_json():
    big = render_report(_big_record(1001), {})
    # before: per-point budget and calibration tables made ~3 MB; now ~0.3 kB per point row
    assert len(big.encode()) < 400_000
    assert "Per-frequency budgets of 1001 points are in results.json" in big
    assert "Per-frequency calibration results of 1001 frequencies are in results.json" in big
    rows = table_after(big, '<table class="grid points">')
    assert len(rows) == 1002  # the points table itself is complete
    assert '<div class="scroll"><table class="grid points">' in big  # scrolls in its box
    small = render_report(_big_record(DETAIL_ROWS_MAX), {})
    assert "per frequency (250 frequencies" in small
    assert "Per-frequency calibration results (250 frequencies)" in small


def test_calibration_entries_with_the_same_settings_are_one_row():
    text = render_report(_big_record(56), {})
    section = text.split('<h2 id="calibration">')[1].split("<h2")[0]
    rows = table_after(section, "<table")
    assert len(rows) == 2  # header + one group of 56 calibrations
    row = dict(zip(rows[0], rows[1], strict=True))
    assert row["Kind"] == "system" and row["Calibrations"] == "56"
    assert row["Frequencies"] == "56: 500\u00a0MHz to 6\u00a0GHz"
    assert row["Averages"] == "4 to 10" and row["Preamp"] == "off"
    assert row["Measured (UTC)"] == "2025-01-01 00:00:00 to 00:00:55"
    assert row["Time (s)"] == f"{56 * 0.25:.3f}"
    assert "noise temperature of the measurement system" in section  # what it is, in words
    ranges = table_after(section, "Calibration results over the sweep")
    assert ["System NF (dB)", "12.000 to 12.055"] in ranges


def test_report_leaves_out_sections_without_data(tmp_path):
    bare = make_record(budgets=False, verdict=False)
    text = render_report(bare, {})
    assert "Uncertainty budget" not in text and 'class="verdict' not in text
    assert 'href="#budget"' not in text and 'href="#verdict"' not in text
    empty = bare.model_copy(update={"points": []})
    path = write_report(empty, tmp_path / "empty.html", plots=None)
    assert "No point was measured." in path.read_text(encoding="utf-8")


def test_skipped_points_simulated_bench_and_gain_measurement_are_shown(record):
    notes = {
        "bench_kind": "simulated",
        "resources": {"analyzer": "sim://demo?seed=1"},
        "skipped_points": [
            {"freq_hz": 7e9, "stage": "measurement", "reason": "no DUT noise <left>"}
        ],
        "gain_measurement": {
            "generator_level_dbm": -43.0,
            "level_limited_by": "analyzer input",
            "rbw_hz": 1e3,
            "band_hz": 5e3,
            "plan": {"averages": 4, "freqs_hz": [1e9]},
            "points": [
                {
                    "freq_hz": 1e9,
                    "gain_db": 26.1,
                    "u_gain_db": 0.02,
                    "through_dbm": -43.2,
                    "dut_dbm": -17.0,
                    "snr_through_db": 80.9,
                    "snr_dut_db": 92.9,
                    "readings_dut_dbm": [-17.0, -17.1],
                    "uncertainty_db": {"linearity": 0.02},
                    "flags": [],
                }
            ],
        },
    }
    info = record.info.model_copy(update={"notes": notes})
    text = render_report(record.model_copy(update={"info": info}), {})
    assert '<span class="tag">simulated bench</span>' in text
    assert "not a measurement of hardware" in text and "sim://demo?seed=1" in text
    assert "1 point not measured" in text and "no DUT noise &lt;left&gt;" in text
    gain = text.split('<h2 id="gain">')[1].split("<h2")[0]
    assert "generator level -43.00 dBm (set by the analyzer input)" in gain
    assert ["SNR, THROUGH pass (dB)", "80.900"] in table_after(gain, "<table")
    assert "readings_dut_dbm" not in gain  # raw readings stay in results.json
    assert 'href="#gain"' in text


def test_report_plots_argument(record, plot_files, tmp_path):
    text = write_report(record, tmp_path / "r.html", plots=plot_files[:2]).read_text()
    assert text.count("data:image/png;base64,") == 2
    assert write_report(record, tmp_path / "none.html", plots=[]).read_text().count("<img") == 0
    not_png = tmp_path / "x.png"
    not_png.write_text("hello")
    with pytest.raises(InputError) as err:
        write_report(record, tmp_path / "bad.html", plots=[not_png])
    assert err.value.field == "plots"
    with pytest.raises(InputError):
        write_report(record, tmp_path / "bad.html", plots=[tmp_path / "missing.png"])


def test_render_run_makes_figures_and_report_from_a_killed_run(record, tmp_path):
    folder = tmp_path / "run"
    writer = RunWriter.create(folder, record.info)
    for point in record.points[:4]:
        writer.add_point(point, budget=record.budget_at(point.freq_hz))
    writer.close()  # never finished
    path = render_run(folder)
    assert path == folder / "report.html"
    figures = ["densities.png", "gain.png", "noise_figure.png", "uncertainty.png"]
    assert sorted(p.name for p in (folder / "plots").iterdir()) == sorted([*figures, NARROW_DIR])
    assert sorted(p.name for p in (folder / "plots" / NARROW_DIR).iterdir()) == figures
    text = path.read_text(encoding="utf-8")
    assert text.count("data:image/png;base64,") == 8  # each figure wide and narrow
    assert "interrupted" in text and "rebuilt from the journal" in text


def test_a_verdict_from_the_limits_module_is_rendered(record, tmp_path):
    from noisebench.results.store import csv_rows
    from noisebench.science.limits import LimitMask, judge

    mask = LimitMask.from_dict(
        {
            "bands": [
                {
                    "start_hz": 10e6,
                    "stop_hz": 1e9,
                    "nf_max_db": 1.6,
                    "gain_min_db": 18.0,
                    "name": "low <band>",
                }
            ]
        }
    )
    verdict = judge(record.points, record.budgets, mask)
    judged = record.model_copy(update={"verdict": verdict.to_dict()})
    assert judged.verdict["unit"] == verdict.unit.value
    text = render_report(judged, {})
    assert "Limits and verdict" in text and "low &lt;band&gt;" in text
    checks = table_after(text, "<h3>Checks not passed")
    assert checks[0][0] == "Frequency (MHz)" and len(checks) > 1
    margins = [float(r[6]) for r in checks[1:]]
    assert margins == sorted(margins) and margins[0] < 0  # worst first
    assert f"{VERDICT_SYMBOL['not_judged']} not judged" in text  # points outside every band
    bands = table_after(text, "<h3>Limit bands</h3>")
    assert bands[0] == ["Start", "Stop", "NF max (dB)", "Gain min (dB)", "Name"]
    rows = list(csv_rows(judged))
    inside = [r for r, p in zip(rows, judged.points, strict=True) if p.freq_hz <= 1e9]
    assert {r["limit"] for r in inside} == {"1.6"}
    assert {r["verdict"] for r in rows[len(inside) :]} == {"not_judged"}
    axes = nf_figure(judged).axes[0]
    (nf_limit,) = [c for c in axes.collections if c.get_label() == "NF limit (max)"]
    assert np.allclose(nf_limit.get_segments()[0], [[10.0, 1.6], [1000.0, 1.6]])  # MHz
    assert [t for t in axes.get_legend_handles_labels()[1] if t.startswith("not judged")]


def test_calibration_store_entries_are_summarised(record):
    from noisebench.bench.acquisition import AcquisitionSettings, AveragingScale, Detector
    from noisebench.running.calibration import CalibrationEntry, CalibrationKind, CalibrationStore
    from noisebench.science.density import NoiseDensity

    freqs = [1e9, 2e9, 3e9]
    settings_used = AcquisitionSettings(
        center_hz=2e9,
        span_hz=2e9,
        rbw_hz=1e6,
        detector=Detector.RMS,
        averaging_scale=AveragingScale.POWER,
        averages=16,
        points=1001,
    )
    te2_k = 290 * (10**1.2 - 1)  # analyzer NF 12 dB, docs/references.md §5
    densities = {
        name: [
            NoiseDensity(
                freq_hz=f,
                density_w_per_hz=scipy.constants.k * t,
                u_density_w_per_hz=1e-22,
                settings=settings_used,
            )
            for f in freqs
        ]
        for name, t in (("hot", 9460.6 + te2_k), ("cold", 290 + te2_k))
    }
    entry = CalibrationEntry(
        kind=CalibrationKind.SYSTEM,
        settings=settings_used,
        freqs_hz=freqs,
        densities=densities,
        cold_temperature_k=296.5,
        instrument_time_s=1.25,
        summary=[{"freq_hz": f, "system_te_k": te2_k} for f in freqs],
    )
    store = CalibrationStore([entry])
    info = record.info.model_copy(update={"calibration": store.to_dict()})
    text = render_report(record.model_copy(update={"info": info}), {})
    section = text.split('<h2 id="calibration">Calibration</h2>')[1].split("<h2")[0]
    assert "<td>system</td>" in section and "<td>gaussian</td>" in section
    assert "3: 1\u00a0GHz to 3\u00a0GHz" in section
    assert "296.50" in section and "1.250" in section
    assert '<td class="num">1\u00a0MHz</td>' in section  # rbw_hz shown as a frequency
    assert ["System Te (K)", f"{te2_k:.1f}"] in table_after(section, "over the sweep")
    assert f"<td>{te2_k:.1f}</td>" in section and "Per-frequency calibration results (3" in section
    assert "u_density_w_per_hz" not in section  # raw densities stay in results.json


@pytest.mark.parametrize(
    ("key", "text"),
    [
        ("system_nf_db", "System NF (dB)"),
        ("u_system_te_k", "u system Te (K)"),
        ("floor_dbm_per_hz", "Floor (dBm/Hz)"),
        ("start_hz", "Start"),
        ("points", "Trace points"),
        ("sweep_time_s", "Sweep time (s)"),
    ],
)
def test_field_names_become_labels_with_units(key, text):
    assert label(key) == text


def test_importing_the_store_plots_and_report_does_not_load_matplotlib():
    code = (
        "import sys, noisebench.results.store, noisebench.results.plots, "
        "noisebench.results.report; "
        "print('matplotlib' in sys.modules)"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert out.stdout.strip() == "False"


def test_report_html_comes_from_autoescaped_templates_only():
    """The markup lives in the packaged templates; the module only gathers facts."""
    from noisebench.results import report

    env = report.environment()
    for name in ("report.html", "macros.html", "report.css"):
        assert env.is_async is False and env.get_template(name)  # packaged and found
        assert env.autoescape is True or env.autoescape(name)  # escaping on for every file
    modules = sorted(Path(report.__file__).parent.glob("*.py"))
    assert len(modules) >= 5  # the package and its section modules
    for module in modules:
        source = module.read_text(encoding="utf-8")
        assert not re.search(r"<(table|tr|td|th|span|p|div|h[1-6]|strong|img)\b", source), module
    cell = report.render_value({"name": "<b>x</b>", "freqs_hz": [1e9, 2.5e9]})
    assert "&lt;b&gt;x&lt;/b&gt;" in cell and "<b>" not in cell
    assert "2.5\u00a0GHz" in cell  # a frequency under a *_hz key keeps its unit


@pytest.mark.parametrize("layout", LAYOUTS, ids=lambda layout: layout.name)
def test_flagged_points_are_marked_on_the_nf_figure_and_explained(record, layout):
    flagged = [p for p in record.points if p.flags]
    assert flagged  # the shared record has one EXCESS_SCATTER point
    axes = nf_figure(record, layout).axes[0]
    handles, labels = axes.get_legend_handles_labels()
    (mark,) = [h for h, t in zip(handles, labels, strict=True) if t.startswith("flagged")]
    assert labels[handles.index(mark)].endswith(f": {len(flagged)} point")
    shown = [t.get_text().replace("\n", " ") for t in axes.get_legend().get_texts()]
    assert f"flagged (see the points table): {len(flagged)} point" in shown  # in the legend
    scale, _ = frequency_scale([p.freq_hz for p in record.points])
    offsets = mark.get_offsets()
    assert np.allclose(offsets[:, 0], [p.freq_hz / scale for p in flagged])
    assert np.all(offsets[:, 1] > [p.nf_db for p in flagged])  # above the point, not on it
    words = html.unescape(render_report(record, {}))
    assert "open triangle (\u25bd) above the point marks a flagged point" in words
    clean = record.model_copy(
        update={"points": [p.model_copy(update={"flags": []}) for p in record.points]}
    )
    labels = nf_figure(clean).axes[0].get_legend_handles_labels()[1]
    assert not [t for t in labels if t.startswith("flagged")]


@pytest.mark.parametrize("layout", LAYOUTS, ids=lambda layout: layout.name)
def test_equal_budget_contributions_both_stay_visible(layout):
    twins = make_record(contributions=2)
    budgets = [
        {**b, "contributions": [*b["contributions"], {**b["contributions"][0], "name": "twin"}]}
        for b in twins.budgets
    ]
    twins = twins.model_copy(update={"budgets": budgets})
    series = budget_series(twins)
    assert coincident_with(series, ["ENR"], "twin") == "ENR"
    assert coincident_with(series, ["jitter <hot>"], "twin") is None
    lines = {line.get_label(): line for line in budget_figure(twins, layout).axes[0].get_lines()}
    twin = lines["twin (equal to ENR)"]
    assert twin.get_linestyle() == "--" and twin.get_markerfacecolor() == "none"
    assert lines["ENR"].get_linestyle() == "-"


def test_series_colours_are_the_cited_okabe_ito_palette():
    """The source named beside SERIES: Okabe & Ito (2008), as matplotlib ships it."""
    import matplotlib
    from matplotlib.colors import to_hex

    from noisebench.results.plots import SERIES

    sequences = matplotlib.color_sequences
    if "okabe_ito" not in sequences:  # matplotlib < 3.10: the palette's published values
        published = {"#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00", "#cc79a7"}
    else:
        published = {to_hex(c) for c in sequences["okabe_ito"]}
    assert set(SERIES) <= published
    # the source is cited where a reader of the repository can find it
    root = Path(__file__).resolve().parents[1]
    references = (root / "docs" / "references.md").read_text(encoding="utf-8")
    (section,) = [s for s in references.split("\n## ") if "Okabe" in s]
    assert section.startswith("§18 ") and "Color Universal Design" in section and "2008" in section
    plots_source = (root / "noisebench" / "results" / "plots.py").read_text(encoding="utf-8")
    assert "docs/references.md §18" in plots_source and "our own" not in plots_source.lower()


def blank_corner_fraction(png: bytes) -> tuple[float, float]:
    """(largest rectangle of pure background anchored in the bottom-right corner, share of
    pure-background rows at the bottom), both as fractions of the image area / height.

    The legend column used to leave such a rectangle below a short legend (about a fifth of
    the figure); rows of background at the bottom are a figure taller than what it draws."""
    import matplotlib.image

    image = matplotlib.image.imread(io.BytesIO(png), format="png")[..., :3]
    background = np.all(np.abs(image - image[-1, -1]) < 1e-6, axis=-1)
    height, width = background.shape
    inked = ~background
    # free width at the right end of each row: distance from the right edge to its last ink
    last_ink = np.where(inked.any(axis=1), width - 1 - np.argmax(inked[:, ::-1], axis=1), -1)
    free = width - 1 - last_ink
    best, narrowest = 0, width
    for rows in range(1, height + 1):  # grow the rectangle upwards from the bottom row
        narrowest = min(narrowest, int(free[height - rows]))
        best = max(best, rows * narrowest)
    empty_rows = int(np.argmax(inked[::-1].any(axis=1)))
    return best / (height * width), empty_rows / height


#: An 8-pt legend row with its spacing is about 3 % of a figure's height. Below the axes,
#: the blank corner is what the last, incomplete legend row leaves beside it: at most 2/3 of
#: the width (three columns, one used) over a title and two wrapped rows (about 10 % of the
#: height), 0.07 of the area; above 0.08 the layout wastes space. Before the legend moved
#: below the axes the corner was 0.16-0.22 of each figure (the legend column on the right).
MAX_BLANK_CORNER = 0.08
MAX_BLANK_BOTTOM_ROWS = 0.03  # the savefig padding only


def test_figures_leave_no_blank_corner_below_their_legend(record):
    from noisebench.results.plots import FIGURES

    drawn = {}
    for name, make in FIGURES:
        figure = make(record)
        if figure is not None:
            drawn[name] = blank_corner_fraction(to_png(figure))
    assert len(drawn) == 4
    for name, (corner, bottom) in drawn.items():
        assert corner < MAX_BLANK_CORNER, (name, corner)
        assert bottom < MAX_BLANK_BOTTOM_ROWS, (name, bottom)


# ----------------------------------------------------------------------------- narrow figures


def _texts(figure) -> list:
    """The visible, non-empty text artists of a drawn figure (titles, labels, ticks inside
    the view, legend, notes)."""
    axes = figure.axes[0]
    low, high = sorted(axes.get_xlim())
    hidden = {
        id(tick.label1)
        for tick in axes.xaxis.get_major_ticks() + axes.xaxis.get_minor_ticks()
        if not low <= tick.get_loc() <= high
    }
    return [
        t
        for t in figure.findobj(lambda a: hasattr(a, "get_fontsize") and hasattr(a, "get_text"))
        if t.get_visible() and t.get_text().strip() and id(t) not in hidden
    ]


def _all_figures(record, layout):
    return [f for f in (make(record, layout) for _, make in FIGURES) if f is not None]


@pytest.mark.parametrize("layout", LAYOUTS, ids=lambda layout: layout.name)
@pytest.mark.parametrize("dut_id", ["LNA-7", "a long device name, rev B, serial 0042-77-31"])
def test_every_text_is_inside_the_figure_and_the_legend_below_the_axis_label(layout, dut_id):
    """A narrow figure must not lose its title, tick labels or legend over an edge (a wrapped
    title grows the figure at the top), nor draw the legend over the frequency axis label."""
    record = make_record(n=56, contributions=8, dut_id=dut_id)
    for figure in _all_figures(record, layout):
        to_png(figure)  # at the layout's dpi, as the report draws it
        renderer = figure._get_renderer()
        frame = figure.bbox
        slack = 1.0  # px: a text's box includes a pixel of the glyphs' side bearing
        for text in _texts(figure):
            box = text.get_window_extent(renderer)
            assert box.x0 >= frame.x0 - slack and box.x1 <= frame.x1 + slack, text.get_text()
            assert box.y0 >= frame.y0 - slack and box.y1 <= frame.y1 + slack, text.get_text()
        axes = figure.axes[0]
        legend = axes.get_legend().get_window_extent(renderer)
        assert legend.y1 <= axes.xaxis.get_tightbbox(renderer).y0 + slack
        # and no wasted band between them: the gap is LEGEND_GAP_IN (0.06 in)
        assert axes.xaxis.get_tightbbox(renderer).y0 - legend.y1 < 0.1 * figure.dpi


@pytest.mark.parametrize(
    ("start_hz", "stop_hz"),
    [(10e6, 6e9), (0.5e9, 6e9), (1e9, 18e9), (100e3, 6e9), (1e9, 2e9), (2.000e9, 2.004e9)],
)
def test_narrow_frequency_tick_labels_do_not_run_into_each_other(start_hz, stop_hz):
    """Fewer ticks on the narrow figures: at least 2 labels, 1.5 characters apart at least."""
    figure = nf_figure(make_record(n=12, start_hz=start_hz, stop_hz=stop_hz), NARROW)
    labels = tick_labels(figure.axes[0])
    assert len(labels) >= 2, labels
    renderer = figure._get_renderer()
    axes = figure.axes[0]
    low, high = sorted(axes.get_xlim())
    boxes = sorted(
        t.label1.get_window_extent(renderer).x0
        for t in axes.xaxis.get_major_ticks()
        if low <= t.get_loc() <= high and t.label1.get_text()
    )
    ends = sorted(
        t.label1.get_window_extent(renderer).x1
        for t in axes.xaxis.get_major_ticks()
        if low <= t.get_loc() <= high and t.label1.get_text()
    )
    gap_px = 1.5 * NARROW.text_pt * 0.6 / 72 * figure.dpi  # 1.5 average character widths
    assert all(b - a >= gap_px for a, b in zip(ends[:-1], boxes[1:], strict=True)), labels


def test_narrow_figures_are_portrait_with_larger_text_and_one_legend_column(record):
    assert NARROW.smallest_pt >= 9.0 > WIDE.smallest_pt
    for wide, narrow in zip(_all_figures(record, WIDE), _all_figures(record, NARROW), strict=True):
        width_in, height_in = narrow.get_size_inches()
        assert width_in == NARROW.size_in[0] < wide.get_size_inches()[0] / 2
        assert height_in > width_in  # portrait: the legend stacked below
        assert narrow.axes[0].get_legend()._ncols == 1
        to_png(narrow, dpi=30)
        assert min(t.get_fontsize() for t in _texts(narrow)) >= NARROW.smallest_pt
    # what the browser test reads from the layouts is the figures' real smallest text
    for layout in LAYOUTS:
        figures = _all_figures(record, layout)
        for figure in figures:
            to_png(figure, dpi=30)
        assert min(t.get_fontsize() for f in figures for t in _texts(f)) == layout.smallest_pt
    # the narrow figures' axes line up with each other as the wide ones do
    frames = {
        tuple(
            np.round(np.array(f.axes[0].get_position().bounds)[[0, 2]] * f.get_size_inches()[0], 6)
        )
        for f in _all_figures(record, NARROW)
    }
    assert len(frames) == 1


def test_titles_wrap_between_their_parts():
    title = "Uncertainty budget \u00b7 LNA-7 \u00b7 y-factor method"
    assert wrap_title(title, 42) == "Uncertainty budget \u00b7 LNA-7\ny-factor method"
    assert wrap_title(title, 100) == title
    long = wrap_title("Gain \u00b7 " + "x" * 10 + " word" * 12, 20)
    assert all(len(line) <= 20 for line in long.splitlines())


def test_figure_pngs_keep_their_colours_exactly_in_a_palette(record):
    """The palette PNG (a third of the bytes) against matplotlib's full-colour rendering:
    the figure's own colours are kept exactly, only rare edge pixels move."""
    import matplotlib.image
    from PIL import Image

    for layout in LAYOUTS:
        figure = nf_figure(record, layout)
        png = to_png(figure)
        assert Image.open(io.BytesIO(png)).mode == "P"
        full = io.BytesIO()
        figure.savefig(full, format="png", dpi=layout.dpi)
        exact = matplotlib.image.imread(io.BytesIO(full.getvalue()), format="png")[..., :3]
        ours = matplotlib.image.imread(io.BytesIO(png), format="png")[..., :3]
        assert ours.shape == exact.shape
        off = np.abs(ours - exact).max(axis=-1)
        assert (off > 1e-6).mean() < 0.02, (off > 1e-6).mean()  # 0.8 % measured
        for colour in (VERDICT_STYLE["fail"][0], VERDICT_STYLE["pass"][0], LIMIT, "#ffffff"):
            rgb = np.array([int(colour[i : i + 2], 16) for i in (1, 3, 5)]) / 255
            drawn = np.all(np.abs(exact - rgb) < 1e-6, axis=-1)  # pixels of exactly it
            assert drawn.sum() > 0 and np.all(np.abs(ours[drawn] - rgb) < 1e-6), colour
        assert len(png) < 0.6 * len(full.getvalue())
