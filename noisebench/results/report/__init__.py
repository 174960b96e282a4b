"""One self-contained HTML report per run: summary, figures, points, budget, calibration.

The file needs nothing else to be read, archived or mailed: the style sheet is inline and the
figures are PNGs embedded as base64 ``data:`` URIs; there is no script and no external link
(the only links are the contents list's in-page anchors).

The HTML lives in Jinja2 templates (``noisebench/results/templates/``: ``report.html``, its
building blocks in ``macros.html`` and the style sheet ``report.css``) with autoescaping on,
so every piece of text taken from the record is escaped by the template engine. This package
only gathers the facts (the report's view model): plain strings, and a few small node types
(:class:`~noisebench.results.report.cells.VerdictTag`, ``Table``, ...) that the macros render.
One module per part of the page, all built on ``cells.py`` (node types, formatters, record
look-ups, the template environment): ``summary.py`` (header, how to read, summary, figures),
``points.py`` (points table, flags, limits and verdict, a converter's frequency plan),
``budgets.py`` (uncertainty budget), ``conditions.py`` (calibration, gain pass, settings,
notes). This module assembles them and writes the file.

Sections, in reading order: a "how to read this report" line and the contents; summary (DUT,
method, bench, dates, instruments, versions, NF and U range, worst margin, verdict); figures;
the flags in words and the per-point table; limits and verdict; the uncertainty budget (over
the sweep, in full at the point with the largest U, and per frequency); calibration; the
acquisition settings applied; notes; the plan; the bench-safety cautions.

Verdicts are shown by symbol and colour together (the same shapes and colours as the figures'
markers, :data:`noisebench.results.plots.VERDICT_STYLE`), so they read without colour vision too.
Long per-frequency tables scroll inside their box; per-frequency budget and calibration
details are left to ``results.json`` above ``DETAIL_ROWS_MAX`` points, which keeps the report
of a 1001-point run small.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Mapping, Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

from noisebench.errors import InputError
from noisebench.results.plots import NARROW_DIR, VERDICT_STYLE
from noisebench.results.report.budgets import _budgets
from noisebench.results.report.cells import (
    DETAIL_ROWS_MAX,
    _budget_list,
    _skipped,
    _when,
    environment,
    label,
    render_value,
    value_node,
    verdict_html,
    verdict_tag,
)
from noisebench.results.report.conditions import (
    NOTES_SHOWN_ELSEWHERE,
    _calibration,
    _gain_measurement,
    _notes,
    _settings,
)
from noisebench.results.report.points import _frequency_plan, _points, _verdict_section
from noisebench.results.report.summary import (
    FIGURE_CAPTIONS,
    _figures,
    _header,
    _how_to_read,
    _summary,
    narrow_figure_media,
)
from noisebench.results.store import REPORT_FILE, RunRecord, write_atomic
from noisebench.running.safety import CAUTIONS as SAFETY_NOTE

logger = logging.getLogger(__name__)


def _sections(record: RunRecord, images: Mapping[str, bytes]) -> list[tuple[str, str]]:
    """``(anchor, title)`` of the sections this record has, in order."""
    info = record.info
    present = [
        ("summary", "Summary", True),
        ("figures", "Figures", bool(images)),
        ("points", "Points", True),
        ("frequency-plan", "Frequency plan", any(p.conversion for p in record.points)),
        ("verdict", "Limits and verdict", bool(record.verdict)),
        ("budget", "Uncertainty budget", bool(_budget_list(record))),
        ("calibration", "Calibration", bool(info.calibration or record.calibrations)),
        (
            "gain",
            "Gain measurement",
            isinstance(info.notes.get("gain_measurement"), Mapping)
            or isinstance(info.notes.get("conversion_gain_measurement"), Mapping),
        ),
        ("settings", "Settings", bool(info.applied_settings)),
        (
            "notes",
            "Notes",
            bool(_skipped(record)) or any(k not in NOTES_SHOWN_ELSEWHERE for k in info.notes),
        ),
        ("plan", "Plan", bool(info.plan)),
        ("safety", "Bench safety", True),
    ]
    return [(anchor, title) for anchor, title, shown in present if shown]


def report_context(record: RunRecord, images: Mapping[str, bytes]) -> dict[str, Any]:
    """Everything ``report.html`` shows, as plain values and nodes (no HTML)."""
    info = record.info
    return {
        "title": f"Noise-figure report: {info.dut_id or info.run_id}",
        "colours": {key: colour for key, (colour, _marker) in VERDICT_STYLE.items()},
        "header": _header(record),
        "howto": _how_to_read(record),
        "contents": _sections(record, images),
        "summary": _summary(record),
        "figures": _figures(images),
        "narrow_media": narrow_figure_media(),
        "points": _points(record),
        "frequency_plan": _frequency_plan(record),
        "verdict": _verdict_section(record),
        "budget": _budgets(record),
        "calibration": _calibration(record),
        "gain": _gain_measurement(record),
        "settings": _settings(record),
        "notes": _notes(record),
        "plan_json": json.dumps(info.plan, indent=2, default=str) if info.plan else "",
        "cautions": list(SAFETY_NOTE),
        "version": info.versions.get("noisebench", ""),
        "generated": _when(datetime.now().astimezone()),
    }


def render_report(record: RunRecord, images: Mapping[str, bytes] | None = None) -> str:
    """The report as one HTML string; ``images`` maps figure file names to PNG bytes."""
    if not isinstance(record, RunRecord):
        raise InputError(
            "record",
            f"must be a RunRecord (got {type(record).__name__})",
            fix="load it with noisebench.results.store.load_run",
        )
    template = environment().get_template("report.html")
    return template.render(report_context(record, images or {}))


def _load_images(plots: Sequence[Path | str] | None, record: RunRecord) -> dict[str, bytes]:
    """Figure name -> PNG bytes; a PNG in a ``narrow/`` folder is the phone rendering of the
    figure of its name (key ``narrow/<name>``)."""
    if plots is None:
        try:
            from noisebench.results.plots import render_report_figures

            return render_report_figures(record)
        except InputError as exc:  # matplotlib missing: a report without figures
            logger.warning("report without figures: %s", exc)
            return {}
    images = {}
    for item in plots:
        path = Path(item)
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise InputError(
                "plots",
                f"cannot read {path}: {exc.strerror or exc}",
                fix="pass PNG files written by plot_run",
            ) from exc
        if not data.startswith(b"\x89PNG\r\n\x1a\n"):
            raise InputError("plots", f"{path} is not a PNG file", fix="pass PNG files")
        narrow = path.parent.name == NARROW_DIR
        images[f"{NARROW_DIR}/{path.name}" if narrow else path.name] = data
    return images


def existing_figures(folder: Path) -> list[Path]:
    """The figures already in ``<folder>/plots`` that are not older than the run's data (the
    journal and ``results.json``), in report order, then the phone renderings (``narrow/``)
    of those: what ``render --no-plots`` embeds. A narrow rendering comes only with its
    figure, and a stale one is left out (the report then shows the wide one on a phone too).
    """
    from noisebench.results.store import JOURNAL_FILE, PLOTS_DIR, RESULTS_JSON_FILE

    folder = Path(folder)
    data = [folder / JOURNAL_FILE, folder / RESULTS_JSON_FILE]
    newest_data = max((p.stat().st_mtime for p in data if p.is_file()), default=0.0)

    def fresh(png: Path) -> bool:
        if png.is_file() and png.stat().st_mtime >= newest_data:
            return True
        if png.is_file():
            logger.warning("%s is older than the run's data: left out of the report", png)
        return False

    found = [folder / PLOTS_DIR / name for name in FIGURE_CAPTIONS]
    found = [png for png in found if fresh(png)]
    narrow = [png.parent / NARROW_DIR / png.name for png in found]
    return found + [png for png in narrow if fresh(png)]


def write_report(record: RunRecord, path: Path, plots: Sequence[Path] | None = None) -> Path:
    """Write the self-contained HTML report; returns its path.

    ``path`` is the HTML file (a folder gets ``report.html`` inside). ``plots`` are PNG files
    to embed (e.g. from :func:`noisebench.results.plots.plot_run`); ``None`` renders the figures in
    memory, ``[]`` leaves them out (and never imports matplotlib).
    """
    path = Path(path)
    if path.is_dir():
        path = path / REPORT_FILE
    text = render_report(record, _load_images(plots, record))
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(path, text)
    except OSError as exc:
        raise InputError(
            "path",
            f"cannot write {path}: {exc.strerror or exc}",
            fix="choose a writable location for the report",
        ) from exc
    logger.info("report written to %s (%d kB)", path, len(text) // 1024)
    return path


def render_run(folder: Path) -> Path:
    """Figures and report of a saved run folder (finished or not); returns the report's path.

    :func:`~noisebench.results.store.load_run`, then :func:`~noisebench.results.plots.plot_run`
    (skipped
    with a warning without matplotlib), then :func:`write_report` to
    ``<folder>/report.html``. (``noisebench render FOLDER`` does the same through
    :func:`noisebench.running.sequencer.write_outputs`.)
    """
    from noisebench.results.plots import plot_run
    from noisebench.results.store import load_run

    folder = Path(folder)
    record = load_run(folder)
    try:
        plots = plot_run(record, folder)
    except InputError as exc:
        if exc.field != "plots":
            raise
        logger.warning("report without figures: %s", exc)
        plots = []
    return write_report(record, folder / REPORT_FILE, plots=plots)


__all__ = [
    "DETAIL_ROWS_MAX",
    "SAFETY_NOTE",
    "environment",
    "existing_figures",
    "label",
    "render_report",
    "report_context",
    "render_run",
    "render_value",
    "value_node",
    "verdict_html",
    "verdict_tag",
    "write_report",
]
