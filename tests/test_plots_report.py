"""Figures and the self-contained HTML report of a run."""

from __future__ import annotations

import base64
import html
import struct
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import scipy.constants

from noisebench.errors import InputError
from noisebench.plots import (
    DEFAULT_DPI,
    DENSE_SWEEP_POINTS,
    FIGURE_SIZE_IN,
    LIMIT,
    VERDICT_STYLE,
    budget_figure,
    density_series,
    frequency_scale,
    gain_figure,
    limit_segments,
    nf_error_bars,
    nf_figure,
    plot_run,
    render_figures,
    to_png,
    use_log_axis,
)
from noisebench.point import Method, PointFlag, PointResult
from noisebench.report import SAFETY_NOTE, render_report, render_run, write_report
from noisebench.results import FLAG_DESCRIPTIONS, RunInfo, RunRecord, RunWriter

T0_K = 290.0
KT0_W_PER_HZ = scipy.constants.k * T0_K  # reference.md §1 (scipy.constants)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
NASTY = '<script>alert("x")</script> & co'


def make_record(n: int = 12, *, start_hz: float = 10e6, stop_hz: float = 6e9,
                budgets: bool = True, verdict: bool = True, gain: bool = True,
                dut_id: str = "LNA-7") -> RunRecord:
    freqs = np.geomspace(start_hz, stop_hz, n)
    points, budget_list, verdicts = [], [], []
    for i, freq in enumerate(freqs):
        nf_db = 1.0 + 0.1 * i
        points.append(PointResult(
            freq_hz=float(freq), method=Method.Y_FACTOR, nf_db=nf_db,
            te_k=T0_K * (10 ** (nf_db / 10) - 1), u_nf_db=0.03 + 0.001 * i, u_te_k=2.0,
            gain_db=(20.0 - 0.1 * i) if gain else None, u_gain_db=0.04 if gain else None,
            y_db=12.0, enr_db=15.0, floor_margin_db=16.0, averages=32, instrument_time_s=0.1,
            densities_w_per_hz={"hot": KT0_W_PER_HZ * 3000, "cold": KT0_W_PER_HZ},
            flags=[PointFlag.EXCESS_SCATTER] if i == 3 else []))
        U = 0.2 + 0.01 * i
        budget_list.append({"freq_hz": float(freq), "contributions": [
            {"name": "ENR", "u": 0.1, "unit": "dB", "sensitivity": 0.99,
             "contribution_db": 0.099},
            {"name": "jitter <hot>", "u": 0.01, "unit": "1", "sensitivity": -4.6,
             "contribution_db": -0.046}], "u_combined_db": U / 2, "k": 2.0,
            "U_expanded_db": U, "method": "gum"})
        word = "fail" if nf_db - U > 1.6 else ("pass" if nf_db + U <= 1.6 else "indeterminate")
        verdicts.append({"freq_hz": float(freq), "verdict": word, "limit": 1.6})
    info = RunInfo(run_id="run-42", method=Method.Y_FACTOR, dut_id=dut_id, operator="kim & lee",
                   identities={"analyzer": "Example,SA<1>,0001,1.0"},
                   versions={"noisebench": "0.1.0", "numpy": np.__version__},
                   calibration={"measured_at": "2025-01-01T00:00:00Z",
                                "settings": {"rbw_hz": 1e6, "detector": "rms"},
                                "points": [{"freq_hz": 1e9, "te2_k": 4306.19}]},
                   applied_settings=[{"rbw_hz": 1e6, "detector": "rms", "averages": 32}],
                   plan={"dut": {"id": dut_id}}, notes={"fixture": "<b>bold</b>"})
    return RunRecord(
        info=info, points=points, budgets=budget_list if budgets else [],
        verdict={"unit": "fail", "points": verdicts,
                 "limits": [{"start_hz": start_hz, "stop_hz": stop_hz, "nf_max_db": 1.6,
                             "gain_min_db": 18.0}]} if verdict else None)


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG specification, ISO/IEC 15948)."""
    assert data[:8] == PNG_SIGNATURE and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def colour_pixels(data: bytes, hex_colour: str) -> int:
    """Pixels within 6/255 of ``hex_colour`` in a PNG."""
    import matplotlib.image
    from matplotlib.colors import to_rgb

    rgb = matplotlib.image.imread(__import__("io").BytesIO(data), format="png")[..., :3]
    return int(np.all(np.abs(rgb - np.array(to_rgb(hex_colour))) < 6 / 255, axis=-1).sum())


@pytest.fixture(scope="module")
def record() -> RunRecord:
    return make_record()


@pytest.fixture(scope="module")
def plot_files(record, tmp_path_factory) -> list[Path]:
    return plot_run(record, tmp_path_factory.mktemp("run"))


# ----------------------------------------------------------------------------- figures


def test_plot_run_writes_valid_pngs_of_sensible_size(plot_files):
    assert [p.name for p in plot_files] == ["noise_figure.png", "gain.png", "densities.png",
                                            "uncertainty.png"]
    width, height = (round(s * DEFAULT_DPI) for s in FIGURE_SIZE_IN)
    for path in plot_files:
        data = path.read_bytes()
        assert path.parent.name == "plots"
        assert png_size(data) == (width, height)
        assert 10_000 < len(data) < 1_000_000
        import matplotlib.image
        pixels = matplotlib.image.imread(path)
        assert pixels[..., :3].std() > 0.05  # something drawn, not a blank canvas


def test_nf_plot_shows_limit_lines_and_verdict_markers_only_when_present(plot_files):
    with_limits = plot_files[0].read_bytes()
    assert colour_pixels(with_limits, LIMIT) > 200
    assert colour_pixels(with_limits, VERDICT_STYLE["fail"][0]) > 50
    bare = to_png(nf_figure(make_record(verdict=False)))
    assert colour_pixels(bare, LIMIT) == 0
    assert colour_pixels(bare, VERDICT_STYLE["fail"][0]) == 0


def test_nf_error_bars_are_expanded_when_budgets_exist(record):
    figure = nf_figure(record)
    axes = figure.axes[0]
    bars = axes.containers[0].lines[2][0].get_segments()
    half_widths = [(seg[1][1] - seg[0][1]) / 2 for seg in bars]
    expected = [b["U_expanded_db"] for b in record.budgets]
    assert np.allclose(half_widths, expected, rtol=0, atol=1e-12)
    assert "NF ± expanded uncertainty U (k = 2)" in axes.get_legend_handles_labels()[1]
    bars, label = nf_error_bars(make_record(budgets=False))
    assert label == "standard uncertainty u (k = 1)"
    expected_u = [p.u_nf_db for p in make_record(budgets=False).points]
    assert list(bars[0]) == expected_u and list(bars[1]) == expected_u


def test_monte_carlo_intervals_give_asymmetric_bars(record):
    budgets = [{**b, "method": "monte_carlo", "k": 1.9 + 0.01 * i,
                "monte_carlo": {"interval_db": [p.nf_db - 0.1, p.nf_db + 0.3]}}
               for i, (b, p) in enumerate(zip(record.budgets, record.points, strict=True))]
    bars, label = nf_error_bars(record.model_copy(update={"budgets": budgets}))
    assert np.allclose(bars[0], 0.1) and np.allclose(bars[1], 0.3)
    assert label == "expanded uncertainty U (k per point)"


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
    assert "pass" not in labels and "fail" in labels
    assert not axes.containers  # no error-bar containers
    sparse = nf_figure(make_record(n=DENSE_SWEEP_POINTS)).axes[0]
    assert len(sparse.containers) == 1 and "pass" in sparse.get_legend_handles_labels()[1]


def test_partial_budgets_fall_back_to_standard_uncertainty(record):
    partial = record.model_copy(update={"budgets": record.budgets[:-1]})
    bars, label = nf_error_bars(partial)
    assert "k = 1" in label and bars[0][0] == bars[1][0] == record.points[0].u_nf_db


def test_limit_lines_are_drawn_at_their_values_over_their_band(record):
    assert limit_segments(record, ("nf_max_db",)) == [(10e6, 6e9, 1.6, "nf_max_db")]
    axes = nf_figure(record).axes[0]
    scale, unit = frequency_scale([p.freq_hz for p in record.points])
    assert (scale, unit) == (1e9, "GHz")
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
    assert frequency_scale([5e6, 900e6]) == (1e6, "MHz")
    assert frequency_scale([100.0]) == (1.0, "Hz")


def test_densities_are_plotted_in_dbm_per_hz(record):
    series = density_series(record)
    assert list(series) == ["hot", "cold"]
    freq, cold_dbm_per_hz = series["cold"]
    # reference.md §1: kT0 = -173.9752 dBm/Hz, recomputed from scipy.constants
    assert np.allclose(cold_dbm_per_hz, 10 * np.log10(KT0_W_PER_HZ / 1e-3), atol=1e-12)
    assert np.isclose(cold_dbm_per_hz[0], -173.9752, atol=5e-5)
    assert np.allclose(series["hot"][1] - cold_dbm_per_hz, 10 * np.log10(3000))
    assert list(freq) == [p.freq_hz for p in record.points]


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


SAFE_TAGS = {"html", "head", "meta", "title", "style", "body", "header", "h1", "h2", "h3", "p",
             "table", "thead", "tbody", "tr", "th", "td", "div", "span", "ul", "li", "strong",
             "figure", "img", "figcaption", "details", "summary", "pre", "footer"}


def test_report_is_one_self_contained_file(record, plot_files, tmp_path):
    path = write_report(record, tmp_path / "report.html", plots=plot_files)
    text = path.read_text(encoding="utf-8")
    parsed = parse(text)
    assert {tag for tag, _ in parsed.tags} <= SAFE_TAGS  # no script, link, iframe, object
    images = [attrs for tag, attrs in parsed.tags if tag == "img"]
    assert len(images) == len(plot_files)
    for attrs, png_path in zip(images, plot_files, strict=True):
        prefix = "data:image/png;base64,"
        assert attrs["src"].startswith(prefix)
        assert base64.b64decode(attrs["src"][len(prefix):]) == png_path.read_bytes()
    assert not any(key.startswith("on") or key == "href" for _, attrs in parsed.tags
                   for key in attrs)
    assert "http://" not in text and "https://" not in text and "url(" not in text


def test_report_without_plots_argument_renders_figures_in_memory(record, tmp_path):
    text = write_report(record, tmp_path).read_text(encoding="utf-8")  # a folder: report.html
    assert (tmp_path / "report.html").exists()
    sources = [a["src"] for t, a in parse(text).tags if t == "img"]
    assert len(sources) == 4
    assert all(base64.b64decode(s.split(",", 1)[1]).startswith(PNG_SIGNATURE) for s in sources)


def test_report_lists_every_point(record):
    parsed = parse(render_report(record, {}))
    cells = [c.strip() for c in parsed.text]
    for point in record.points:
        assert f"{point.nf_db:.3f}" in cells
        assert f"{point.te_k:.1f}" in cells
    rows = render_report(record, {}).split('<table class="points">')[1].split("</table>")[0]
    assert rows.count("<tr>") == len(record.points) + 1  # header row + one per point


def test_report_escapes_every_string(tmp_path):
    nasty = make_record(dut_id=NASTY)
    nasty.warnings.append("line 3: <incomplete>")
    text = render_report(nasty, {})
    assert "<script>" not in text and "<b>bold</b>" not in text and "<incomplete>" not in text
    assert html.escape(NASTY) in text
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
    assert html.escape(FLAG_DESCRIPTIONS[PointFlag.EXCESS_SCATTER]) in text
    assert "Uncertainty budgets" in body and "ENR (+0.0990 dB)" in body
    assert f"{record.budgets[0]['U_expanded_db']:.3f}" in body
    assert "Calibration" in body and "4306.19" in body
    assert "numpy" in body and np.__version__ in body
    for line in SAFETY_NOTE:
        assert html.escape(line) in text


def test_report_budget_details_show_distribution_and_omitted_terms(record):
    budgets = [{**b, "omitted": ["mismatch <no |Gamma|>"], "monte_carlo": {"trials": 100000},
                "contributions": [{**c, "distribution": "rectangular"}
                                  for c in b["contributions"]]} for b in record.budgets]
    text = render_report(record.model_copy(update={"budgets": budgets}), {})
    assert "<th>Distribution</th>" in text and "<td>rectangular</td>" in text
    assert "Not included (no data): mismatch &lt;no |Gamma|&gt;." in text
    assert "100000" in text


def test_report_leaves_out_sections_without_data(tmp_path):
    bare = make_record(budgets=False, verdict=False)
    text = render_report(bare, {})
    assert "Uncertainty budgets" not in text and 'class="verdict' not in text
    empty = bare.model_copy(update={"points": []})
    path = write_report(empty, tmp_path / "empty.html", plots=None)
    assert "No point was measured." in path.read_text(encoding="utf-8")


def test_report_plots_argument(record, plot_files, tmp_path):
    text = write_report(record, tmp_path / "r.html", plots=plot_files[:2]).read_text()
    assert text.count("data:image/png;base64,") == 2
    assert write_report(record, tmp_path / "none.html", plots=[]).read_text().count(
        "<img") == 0
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
    assert sorted(p.name for p in (folder / "plots").iterdir()) == [
        "densities.png", "gain.png", "noise_figure.png", "uncertainty.png"]
    text = path.read_text(encoding="utf-8")
    assert text.count("data:image/png;base64,") == 4
    assert "interrupted" in text and "rebuilt from the journal" in text


def test_a_verdict_from_the_limits_module_is_rendered(record, tmp_path):
    from noisebench.limits import LimitMask, judge
    from noisebench.results import csv_rows

    mask = LimitMask.from_dict({"bands": [{"start_hz": 10e6, "stop_hz": 1e9, "nf_max_db": 1.6,
                                           "gain_min_db": 18.0, "name": "low <band>"}]})
    verdict = judge(record.points, record.budgets, mask)
    judged = record.model_copy(update={"verdict": verdict.to_dict()})
    assert judged.verdict["unit"] == verdict.unit.value
    text = render_report(judged, {})
    assert "Limits and verdict" in text and "low &lt;band&gt;" in text
    assert "Checks not passed" in text
    assert "not_judged" in text
    rows = list(csv_rows(judged))
    inside = [r for r, p in zip(rows, judged.points, strict=True) if p.freq_hz <= 1e9]
    assert {r["limit"] for r in inside} == {"1.6"}
    assert {r["verdict"] for r in rows[len(inside):]} == {"not_judged"}
    (nf_limit,) = [c for c in nf_figure(judged).axes[0].collections
                   if c.get_label() == "NF limit (max)"]
    assert np.allclose(nf_limit.get_segments()[0], [[0.01, 1.6], [1.0, 1.6]])


def test_calibration_store_entries_are_summarised(record):
    from noisebench.acquisition import AcquisitionSettings, AveragingScale, Detector
    from noisebench.calibration import CalibrationEntry, CalibrationKind, CalibrationStore
    from noisebench.density import NoiseDensity

    freqs = [1e9, 2e9, 3e9]
    settings_used = AcquisitionSettings(center_hz=2e9, span_hz=2e9, rbw_hz=1e6,
                                        detector=Detector.RMS,
                                        averaging_scale=AveragingScale.POWER, averages=16,
                                        points=1001)
    te2_k = 290 * (10 ** 1.2 - 1)  # analyzer NF 12 dB, reference.md §5
    densities = {name: [NoiseDensity(freq_hz=f, density_w_per_hz=scipy.constants.k * t,
                                     u_density_w_per_hz=1e-22, settings=settings_used)
                        for f in freqs] for name, t in (("hot", 9460.6 + te2_k),
                                                        ("cold", 290 + te2_k))}
    entry = CalibrationEntry(kind=CalibrationKind.SYSTEM, settings=settings_used,
                             freqs_hz=freqs, densities=densities, cold_temperature_k=296.5,
                             instrument_time_s=1.25,
                             summary=[{"freq_hz": f, "system_te_k": te2_k} for f in freqs])
    store = CalibrationStore([entry])
    info = record.info.model_copy(update={"calibration": store.to_dict()})
    text = render_report(record.model_copy(update={"info": info}), {})
    section = text.split("<h2>Calibration</h2>")[1].split("<h2>")[0]
    assert "<td>system</td>" in section and "<td>gaussian</td>" in section
    assert "3: 1&nbsp;GHz to 3&nbsp;GHz" in section
    assert "296.50" in section and "1.250" in section
    assert '<td class="num">1&nbsp;MHz</td>' in section  # rbw_hz shown as a frequency
    assert f"{te2_k:.6g}" in section and "Per-frequency calibration results (3" in section
    assert "u_density_w_per_hz" not in section  # raw densities stay in results.json


def test_importing_the_store_plots_and_report_does_not_load_matplotlib():
    import subprocess
    import sys

    code = ("import sys, noisebench.results, noisebench.plots, noisebench.report; "
            "print('matplotlib' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, timeout=60)
    assert out.stdout.strip() == "False"
