"""The report in a real browser: Debian's chromium, headless, opening the pages from file://.

Checks that the index and a book page load with no console error, no script error, no dialog and
no network request, that the key figures are in the DOM as the archive has them, that the page
prints to PDF from its own @page rule, and that a screenshot is not blank (the browser decodes it
into a canvas on an empty page and the pixel variance is measured).

Needs /usr/bin/chromium and the ``playwright`` package (driving the installed chromium; no browser
is ever downloaded). Without them the tests are skipped, unless the CI environment variable is set,
in which case they fail.
"""

from __future__ import annotations

import base64
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from report_fixtures import AS_OF, build_archive

from attribution import report
from attribution.config import JobConfig
from attribution.report import charts

pytestmark = pytest.mark.browser

CHROMIUM = Path("/usr/bin/chromium")
LAUNCH_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
               "--no-first-run", "--disable-sync", "--disable-default-apps", "--disable-extensions",
               "--mute-audio", "--no-default-browser-check"]
BOOKS = ("Vol Arb North", "Index Gamma", "<script>alert(1)</script>")

PIXEL_STATS = """async (data) => {
  const img = new Image();
  img.src = "data:image/png;base64," + data;
  await img.decode();
  const canvas = document.createElement("canvas");
  canvas.width = img.width; canvas.height = img.height;
  const g = canvas.getContext("2d");
  g.drawImage(img, 0, 0);
  const px = g.getImageData(0, 0, canvas.width, canvas.height).data;
  let n = 0, sum = 0, sum2 = 0;
  const colours = new Set();
  for (let i = 0; i < px.length; i += 4 * 5) {
    const y = 0.299 * px[i] + 0.587 * px[i + 1] + 0.114 * px[i + 2];
    n += 1; sum += y; sum2 += y * y;
    if (colours.size < 4096) colours.add((px[i] << 16) | (px[i + 1] << 8) | px[i + 2]);
  }
  const mean = sum / n;
  return {variance: sum2 / n - mean * mean, colours: colours.size, width: canvas.width, height: canvas.height};
}"""


def _in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() not in ("", "0", "false", "no")


def _unavailable() -> str | None:
    if not CHROMIUM.exists():
        return f"Debian's chromium is not installed at {CHROMIUM} (apt-get install chromium)"
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        return "the playwright package is not installed (pip install playwright; it drives the installed chromium)"
    return None


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    """A headless chromium; skipped with the reason when absent, failed instead under CI."""
    reason = _unavailable()
    if reason:
        if _in_ci():
            pytest.fail(f"{reason}; the CI environment variable is set, so the browser test must run")
        pytest.skip(reason)
    from playwright.sync_api import sync_playwright
    with sync_playwright() as pw:
        launched = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=LAUNCH_ARGS)
        try:
            yield launched
        finally:
            launched.close()


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> tuple[Any, Path]:
    """A small invented night rendered once."""
    root = tmp_path_factory.mktemp("browser")
    con = build_archive(root / "archive.duckdb", BOOKS, per_book=12)
    return con, report.render_night(con, AS_OF, root / "reports", JobConfig())


@dataclass
class Visit:
    """What happened while a page was open."""

    page: Any
    console_errors: list[str] = field(default_factory=list)
    page_errors: list[str] = field(default_factory=list)
    requests: list[str] = field(default_factory=list)
    dialogs: list[str] = field(default_factory=list)


@pytest.fixture()
def visit(browser: Any) -> Iterator[Any]:
    """Open a file in a fresh context, recording console errors, page errors, dialogs and every request."""
    contexts = []

    def open_page(path: Path) -> Visit:
        context = browser.new_context(viewport={"width": 1360, "height": 900}, java_script_enabled=True)
        contexts.append(context)
        page = context.new_page()
        seen = Visit(page)
        page.on("console", lambda m: seen.console_errors.append(m.text) if m.type == "error" else None)
        page.on("pageerror", lambda e: seen.page_errors.append(str(e)))
        page.on("request", lambda r: seen.requests.append(r.url))
        page.on("dialog", lambda d: (seen.dialogs.append(d.message), d.dismiss()))
        context.route("**/*", lambda route: route.continue_() if route.request.url.startswith("file://")
                      else route.abort())
        page.goto(path.resolve().as_uri(), wait_until="load")
        page.wait_for_timeout(100)
        return seen

    yield open_page
    for context in contexts:
        context.close()


def _assert_clean(seen: Visit, path: Path) -> None:
    assert seen.console_errors == []
    assert seen.page_errors == []
    assert seen.dialogs == []
    assert seen.requests == [path.resolve().as_uri()], "the page itself is the only request"
    assert seen.page.evaluate("document.scripts.length") == 0
    assert seen.page.evaluate("performance.getEntriesByType('resource').length") == 0


def _assert_not_blank(browser: Any, png: bytes) -> None:
    context = browser.new_context()
    try:
        page = context.new_page()
        page.goto("about:blank")
        stats = page.evaluate(PIXEL_STATS, base64.b64encode(png).decode("ascii"))
    finally:
        context.close()
    assert stats["width"] >= 1000 and stats["height"] >= 600
    assert stats["variance"] > 50.0, stats      # a blank page has variance 0
    assert stats["colours"] > 20, stats


def test_index_loads_clean_with_the_night_figures(browser: Any, visit: Any, night: tuple[Any, Path],
                                                  tmp_path: Path) -> None:
    """The index opens offline with no error or request, shows the night's total and one row per book."""
    con, index = night
    total = con.execute("SELECT sum(pnl_total) FROM position_pnl WHERE as_of = ?", [AS_OF]).fetchone()[0]
    seen = visit(index)
    _assert_clean(seen, index)
    page = seen.page
    assert page.text_content("#night-pnl_total").strip() == charts.format_amount(total)
    assert page.locator("#book-table tbody tr[data-book-file]").count() == len(BOOKS)
    assert page.locator("#cautions").is_visible()
    png = page.screenshot(full_page=True, path=str(tmp_path / "index.png"))
    _assert_not_blank(browser, png)


def test_book_page_loads_clean_with_its_figures(browser: Any, visit: Any, night: tuple[Any, Path],
                                                tmp_path: Path) -> None:
    """A book page opens offline with no error or request; headline, waterfall and charts are in the DOM."""
    con, index = night
    book = BOOKS[0]
    sums = con.execute("SELECT sum(pnl_total), sum(pnl_residual) FROM position_pnl WHERE as_of = ? AND book = ?",
                       [AS_OF, book]).fetchone()
    path = index.parent / report.file_name_for(book)
    seen = visit(path)
    _assert_clean(seen, path)
    page = seen.page
    assert page.text_content("#book-name").strip() == book
    assert page.text_content("#fig-pnl_total").strip() == charts.format_amount(sums[0])
    assert page.text_content("#fig-pnl_residual").strip() == charts.format_amount(sums[1])
    assert page.text_content("#wf-pnl_total").strip() == charts.format_amount(sums[0])
    assert page.locator("svg.chart").count() == 4  # two waterfalls (terms; options, hedges, cash), two histories
    assert page.locator("#position-table tbody tr").count() == report.TOP_POSITIONS \
        or page.locator("#position-table tbody tr").count() == 12
    png = page.screenshot(full_page=True, path=str(tmp_path / "book.png"))
    _assert_not_blank(browser, png)
    pdf = page.pdf(prefer_css_page_size=True, print_background=True)
    assert pdf.startswith(b"%PDF")


def test_hostile_book_name_stays_text_in_the_browser(visit: Any, night: tuple[Any, Path]) -> None:
    """A book named like a script tag renders as text: no dialog, no script element, the name in the heading."""
    _, index = night
    book = BOOKS[2]
    path = index.parent / report.file_name_for(book)
    seen = visit(path)
    _assert_clean(seen, path)
    assert seen.page.text_content("#book-name").strip() == book
    index_seen = visit(index)
    _assert_clean(index_seen, index)
    assert index_seen.page.get_by_role("link", name=book).count() == 1


@pytest.fixture(scope="module")
def demo_index(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A short demo (ten business days of the packaged desk) with its last night's pages."""
    from attribution.demo.run import run_demo
    root = tmp_path_factory.mktemp("demo-browser")
    assert run_demo(root / "demo", days=10, echo=lambda _: None) == 0
    (index,) = (root / "demo" / "reports").glob("*/index.html")
    return index


def _links(seen: Visit) -> list[str]:
    return seen.page.eval_on_selector_all("a[href]", "links => links.map(a => a.getAttribute('href'))")


def _follow_every_link(seen: Visit, path: Path) -> None:
    """Every link of the page names a file of the night's folder that opens in the browser without a request
    leaving it (the context aborts anything but file:// and records every request)."""
    links = _links(seen)
    assert links, f"{path.name} has no link"
    for href in links:
        assert "://" not in href and not href.startswith(("/", "#")), href
        target = path.parent / href
        assert target.is_file(), f"{path.name}: link {href} does not resolve"
        response = seen.page.goto(target.resolve().as_uri(), wait_until="load")
        assert response is not None and response.ok, href
    assert all(url.startswith(path.parent.resolve().as_uri()) for url in seen.requests), seen.requests
    assert seen.console_errors == [] and seen.page_errors == [] and seen.dialogs == []


def test_demo_index_desk_and_book_pages_open_and_every_link_resolves(visit: Any, demo_index: Path) -> None:
    """The demo's index, a desk page and a book page load clean (no script, no request but the page) and every
    link on each opens a page of the same night, with no request leaving the folder."""
    seen = visit(demo_index)
    _assert_clean(seen, demo_index)
    links = _links(seen)
    desk = demo_index.parent / next(h for h in links if h.startswith("desk-"))
    book = demo_index.parent / next(h for h in links if h.startswith("book-"))
    assert seen.page.locator("#book-table tbody.desk").count() >= 2   # the demo's books sit on several desks
    _follow_every_link(seen, demo_index)
    for path in (desk, book):
        page = visit(path)
        _assert_clean(page, path)
        _follow_every_link(page, path)
    assert visit(desk).page.locator("#book-table tbody tr[data-book-file]").count() >= 1
    book_page = visit(book).page
    for section in ("to-date-table", "strategy-table", "vol-parts-table"):
        assert book_page.locator(f"#{section}").count() == 1, section
