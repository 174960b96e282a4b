"""The HTML report in a real headless browser (Debian's chromium, driven by playwright).

What a reader on a phone (390 px) and on a desktop (1280 px) gets: no console error, no
request other than the file itself, no sideways page overflow, every figure within the
screen's width (scaled down on a phone, its drawn size on a desktop), every table's last
column reachable (its box scrolls, with a visible cue at phone width). The browser is the
system one (``chromium`` on PATH, or ``NOISEBENCH_TEST_CHROMIUM``); playwright downloads none.
Where neither playwright nor a chromium can be had, the tests are skipped with that reason
(``.ci/run`` installs both).
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest
from test_plots_report import make_record

from noisebench.results.plots import NARROW, WIDE, render_figures
from noisebench.results.report import write_report
from noisebench.results.report.summary import MIN_FIGURE_TEXT_PX, narrow_figure_media

WIDTHS_PX = (390, 1280)
#: the page's side padding at most (report.css: clamp(.75rem, 3vw, 2.5rem) at 15 px)
MAX_SIDE_PADDING_PX = 2.5 * 15
PAGE_TIMEOUT_MS = 120_000  # generous: the machine may be busy; nothing here is about speed


def _chromium() -> str | None:
    return os.environ.get("NOISEBENCH_TEST_CHROMIUM") or shutil.which("chromium")


@pytest.fixture(scope="module")
def browser():
    sync_api = pytest.importorskip(
        "playwright.sync_api", reason="playwright is not installed (pip install -e '.[test]')"
    )
    executable = _chromium()
    if not executable:
        pytest.skip("no chromium on PATH (apt-get install chromium, or NOISEBENCH_TEST_CHROMIUM)")
    with sync_api.sync_playwright() as playwright:
        launched = playwright.chromium.launch(
            executable_path=executable,
            args=["--no-sandbox", "--disable-gpu"],
            timeout=PAGE_TIMEOUT_MS,
        )
        yield launched
        launched.close()


@pytest.fixture(scope="module")
def report_file(tmp_path_factory) -> Path:
    """A 56-point report with figures, a verdict, a budget and a flagged point."""
    record = make_record(n=56, contributions=8)
    folder = tmp_path_factory.mktemp("browser")
    return write_report(record, folder / "report.html", plots=None) and folder / "report.html"


def _open(browser, path: Path, width: int):
    """The page at ``width`` with every request, console error and page error recorded;
    anything but the file itself (and its own data: URIs) is refused."""
    context = browser.new_context(viewport={"width": width, "height": 900})
    page = context.new_page()
    page.set_default_timeout(PAGE_TIMEOUT_MS)
    seen = {"requests": [], "errors": []}
    url = path.as_uri()

    def route(route_) -> None:
        request_url = route_.request.url
        seen["requests"].append(request_url)
        if request_url == url or request_url.startswith("data:"):
            route_.continue_()
        else:
            route_.abort()

    page.route("**/*", route)
    page.on("console", lambda m: m.type == "error" and seen["errors"].append(m.text))
    page.on("pageerror", lambda e: seen["errors"].append(str(e)))
    page.goto(url, wait_until="load")
    return context, page, seen


@pytest.mark.parametrize("width", WIDTHS_PX)
def test_report_loads_clean_with_no_request_but_itself(browser, report_file, width):
    context, page, seen = _open(browser, report_file, width)
    try:
        assert seen["errors"] == []
        outside = [u for u in seen["requests"] if u != report_file.as_uri()]
        assert [u for u in outside if not u.startswith("data:")] == []
        assert page.title().startswith("Noise-figure report: LNA-7")
    finally:
        context.close()


@pytest.mark.parametrize("width", WIDTHS_PX)
def test_page_never_overflows_sideways(browser, report_file, width):
    context, page, _ = _open(browser, report_file, width)
    try:
        widths = page.evaluate(
            "() => [document.documentElement.scrollWidth, document.documentElement.clientWidth]"
        )
        assert widths[0] <= widths[1] == width, widths
        # no single element sticks out of the page either (a box that scrolls is fine)
        wider = page.evaluate(
            """w => [...document.querySelectorAll('body *')]
                 .filter(e => { const r = e.getBoundingClientRect();
                                return r.width > 0 && r.right > w + 0.5
                                  && !e.closest('.wrap, .scroll'); })
                 .map(e => e.tagName + '.' + e.className)""",
            width,
        )
        assert wider == []
    finally:
        context.close()


@pytest.mark.parametrize("width", WIDTHS_PX)
def test_figures_fit_the_screen_and_keep_their_shape(browser, report_file, width):
    context, page, _ = _open(browser, report_file, width)
    try:
        images = page.evaluate(
            """() => [...document.querySelectorAll('figure img')].map(i => ({
                 complete: i.complete, natural: i.naturalWidth, naturalH: i.naturalHeight,
                 content: i.clientWidth, contentH: i.clientHeight,
                 left: i.getBoundingClientRect().left, right: i.getBoundingClientRect().right,
                 shown: i.getBoundingClientRect().width,
                 height: i.getBoundingClientRect().height }))"""
        )
        assert len(images) == 4
        for image in images:
            # decoded (the narrow rendering is 4.4 in at 150 dpi, the wide 9 in at 110 dpi)
            assert image["complete"] and image["natural"] > 100 * NARROW.size_in[0]
            assert image["height"] > 0
            # on the screen whole: no figure wider than the viewport, none cut at an edge
            assert image["shown"] <= width and image["left"] >= 0, image
            assert image["right"] <= width + 0.5, image
            # never blown up past its drawn size (blurry), and at 1280 px shown at that size
            # (the content box: the 1 px border is outside the picture)
            assert image["content"] <= image["natural"], image
            if width >= image["natural"] + 2 * MAX_SIDE_PADDING_PX:
                assert image["content"] == image["natural"]
            # the aspect ratio is kept (height: auto): 1 px of rounding at most
            ratio = image["naturalH"] / image["natural"]
            assert image["contentH"] == pytest.approx(image["content"] * ratio, abs=1.0), image
    finally:
        context.close()


@pytest.mark.parametrize("width", WIDTHS_PX)
def test_every_table_last_column_can_be_scrolled_into_view(browser, report_file, width):
    context, page, _ = _open(browser, report_file, width)
    try:
        page.evaluate("() => document.querySelectorAll('details').forEach(d => d.open = true)")
        tables = page.locator("table")
        count = tables.count()
        assert count > 5
        for index in range(count):
            table = tables.nth(index)
            last = table.locator("tr").first.locator("th, td").last
            last.scroll_into_view_if_needed()
            box = last.bounding_box()
            assert box is not None and box["width"] > 0, f"table {index}: last column hidden"
            assert box["x"] >= -0.5 and box["x"] + box["width"] <= width + 0.5, (index, box)
            clipped = last.evaluate(
                """cell => { const r = cell.getBoundingClientRect();
                   for (let e = cell.parentElement; e; e = e.parentElement) {
                     const s = getComputedStyle(e);
                     if (s.overflowX !== 'visible') { const b = e.getBoundingClientRect();
                       if (r.left < b.left - 0.5 || r.right > b.right + 0.5) return true; } }
                   return false; }"""
            )
            assert not clipped, f"table {index}: the last column is cut off by its box"
    finally:
        context.close()


def test_phone_width_says_that_wide_tables_scroll(browser, report_file):
    context, page, _ = _open(browser, report_file, 390)
    try:
        cue = page.locator("p.cue")
        assert cue.is_visible() and "scroll it sideways" in cue.inner_text()
        box = page.locator("div:has(> table.points)")
        sizes = box.evaluate("b => [b.scrollWidth, b.clientWidth]")
        assert sizes[0] > sizes[1]  # it does overflow, so the cue is true
        shadow = box.evaluate("b => getComputedStyle(b).backgroundImage")
        assert shadow.count("gradient") == 4  # the scroll shadows at both edges
    finally:
        context.close()
    context, page, _ = _open(browser, report_file, 1280)
    try:
        assert not page.locator("p.cue").is_visible()  # no cue where nothing hides
    finally:
        context.close()


def test_figures_embedded_are_those_the_figure_code_draws(report_file):
    """The browser tests look at the real figures, not stand-ins."""
    text = report_file.read_text(encoding="utf-8")
    record = make_record(n=56, contributions=8)
    assert text.count("data:image/png;base64,") == 2 * len(render_figures(record)) == 8
    assert text.count(f'<source media="{narrow_figure_media()}" srcset="data:image/png') == 4


def test_points_table_keeps_its_frequency_column_in_view_when_scrolled(browser, report_file):
    context, page, _ = _open(browser, report_file, 390)
    try:
        box = page.locator("div:has(> table.points)")
        first = page.locator("table.points tbody tr").first.locator("td").first
        before = first.bounding_box()
        box.evaluate("b => { b.scrollLeft = b.scrollWidth; }")
        after = first.bounding_box()
        assert box.evaluate("b => b.scrollLeft") > 100  # it did scroll
        assert abs(after["x"] - before["x"]) < 1  # the frequency stayed where it was
    finally:
        context.close()


#: Just above the switch to the narrow figures: the wide ones at their smallest.
SWITCH_PX = int(narrow_figure_media().split(":")[1].strip(" px)"))


@pytest.mark.parametrize("width", [390, SWITCH_PX, SWITCH_PX + 1, 1280])
def test_figure_text_is_at_least_9_css_px_on_the_screen(browser, report_file, width):
    """The smallest text of each figure as the reader sees it: its size in points (the
    figure's layout) x dpi / 72 x the shown width / the PNG's own width (measured in the
    browser). Below the switch the browser must pick the narrow rendering (<picture>), above
    it the wide one. The wide figure at 390 px would give 7.5 x 366 / 648 = 4.2 px."""
    context, page, _ = _open(browser, report_file, width)
    try:
        images = page.evaluate(
            """() => [...document.querySelectorAll('figure picture')].map(p => {
                 const i = p.querySelector('img'), s = p.querySelector('source');
                 return { current: i.currentSrc, wide: i.src, narrow: s && s.srcset,
                          natural: i.naturalWidth, shown: i.clientWidth }; })"""
        )
        assert len(images) == 4
        for image in images:
            narrow = image["current"] == image["narrow"]
            assert narrow or image["current"] == image["wide"]
            assert narrow == (width <= SWITCH_PX), (width, image["natural"])
            layout = NARROW if narrow else WIDE
            # the PNG is the layout's drawing: its width in pixels is width_in x dpi
            assert abs(image["natural"] - layout.size_in[0] * layout.dpi) <= 1
            text_px = layout.smallest_pt / 72 * layout.dpi * image["shown"] / image["natural"]
            assert text_px >= MIN_FIGURE_TEXT_PX, (width, layout.name, text_px)
            if width == 1280:  # the desktop rendering at its drawn size
                assert image["shown"] == image["natural"]
            if width == 390:
                print(f"390 px: figure text {text_px:.1f} CSS px, shown {image['shown']} px")
    finally:
        context.close()
