"""The report in a real browser: Debian's Chromium driven by Playwright.

One checked run (no relaxations, few draws) serves every test. Each page is
opened with every request routed: anything that is not ``file://`` or
``data:`` is refused and fails the test, so a report that reached for the
network would be caught here. Screenshots and the printed PDF are kept under
``test-artifacts/`` (git-ignored) for a person to look at.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

from workbench.cli import main
from workbench.report.html import BADGES

CHROMIUM = Path("/usr/bin/chromium")
# Flags for a headless run with no sandbox (root in a container) and no
# background traffic of the browser's own (updates, sync, QUIC probes).
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"
PHONE = {"width": 375, "height": 812}
NARROW_PHONE = {"width": 390, "height": 844}
DESKTOP = {"width": 1280, "height": 900}
FIRST_SCREEN = {"width": 1280, "height": 800}
# A section printed on a new page starts within this distance of the page's
# top edge (points): Chromium's default print margin plus a heading's margin.
TOP_SLACK_PT = 72.0
SECTIONS = ("diagnosis", "evidence", "fit", "sampler", "loo", "manifest")

# CI installs Chromium (.ci/run), so there a missing browser fails instead of skipping.
NEEDS_CHROMIUM = pytest.mark.skipif(not CHROMIUM.exists() and not os.environ.get("CI"),
                                    reason="Debian's chromium is not installed at /usr/bin/chromium "
                                           "(apt-get install chromium chromium-driver)")
pytestmark = [pytest.mark.browser, NEEDS_CHROMIUM]


# --- fixtures ------------------------------------------------------------------


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory, throwing_csv):
    out = tmp_path_factory.mktemp("browser") / "run"
    code = main(["check", "threshold-geometry", "--data", throwing_csv, "--set", "clearance=0.25",
                 "--out", str(out), "--seed", "5", "--draws", "200", "--tune", "200", "--no-relax",
                 "--quiet", "--history", str(out.parent / "history.sqlite")])
    assert code == 0
    return out


@pytest.fixture(scope="module")
def browser():
    from playwright.sync_api import sync_playwright

    assert CHROMIUM.exists(), "CI must install Debian's chromium (see .ci/run)"
    with sync_playwright() as p:
        instance = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        yield instance
        instance.close()


class Visit:
    """A page opened with every request routed and every complaint recorded."""

    def __init__(self, browser, path: Path, viewport: dict):
        self.context = browser.new_context(viewport=viewport)
        self.page = self.context.new_page()
        self.requests: list[str] = []
        self.refused: list[str] = []
        self.errors: list[str] = []
        self.page.on("console", lambda m: m.type == "error" and self.errors.append(m.text))
        self.page.on("pageerror", lambda e: self.errors.append(str(e)))
        self.page.on("dialog", lambda d: (self.errors.append(f"dialog: {d.message}"), d.dismiss()))
        self.page.on("request", lambda r: self.requests.append(r.url))
        self.page.route("**/*", self._route)
        self.page.goto(path.resolve().as_uri())

    def _route(self, route):
        url = route.request.url
        if url.startswith(("file://", "data:")):
            route.continue_()
        else:
            self.refused.append(url)
            route.abort()

    def close(self):
        self.context.close()


@pytest.fixture
def visit(browser):
    opened = []

    def open_page(path: Path, viewport: dict = DESKTOP) -> Visit:
        opened.append(Visit(browser, path, viewport))
        return opened[-1]

    yield open_page
    for v in opened:
        v.close()


def artifact(name: str) -> Path:
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS / name


# --- loading -------------------------------------------------------------------------


def test_report_loads_without_console_errors(run_folder, visit):
    v = visit(run_folder / "report.html")
    v.page.wait_for_load_state("load")
    assert v.errors == []


def test_report_makes_no_network_request(run_folder, visit):
    v = visit(run_folder / "report.html")
    v.page.wait_for_load_state("load")
    assert v.refused == []
    assert all(url.startswith(("file://", "data:")) for url in v.requests), v.requests


def test_every_figure_is_visible_with_a_size_once_its_fold_is_open(run_folder, visit):
    v = visit(run_folder / "report.html")
    v.page.evaluate("() => document.querySelectorAll('details').forEach(d => d.open = true)")
    images = v.page.locator("img")
    assert images.count() >= 4  # fit, PPC statistics, ranks, pairs, Pareto k
    for i in range(images.count()):
        img = images.nth(i)
        img.scroll_into_view_if_needed()
        assert img.is_visible()
        size = img.evaluate("e => [e.complete, e.naturalWidth, e.naturalHeight]")
        assert size[0] and size[1] > 0 and size[2] > 0, img.get_attribute("alt")
        box = img.bounding_box()
        assert box["width"] > 0 and box["height"] > 0
    v.page.screenshot(path=artifact("report-desktop.png"), full_page=True)


def test_fit_and_leave_one_out_sections_say_what_each_point_and_term_is(run_folder, visit):
    v = visit(run_folder / "report.html")
    v.page.evaluate("() => document.querySelectorAll('details').forEach(d => d.open = true)")
    fit = v.page.locator("#fit figcaption").first.inner_text()
    assert "each point with the 90% interval of its replicated values" in fit
    loo = v.page.locator("#loo").inner_text()
    # The throwing table has one row per distance: PSIS-LOO leaves out a distance.
    assert "Pareto k of each distance in PSIS-LOO (11 distances" in loo
    assert "distance has a high Pareto k" in loo or "Distances with high Pareto k: distance " in loo
    assert "numbered from 1" not in loo
    assert v.page.locator("#loo img").first.is_visible()


# --- order and links -------------------------------------------------------------------


def test_verdict_section_comes_first_and_in_the_first_screen(run_folder, visit):
    for viewport in (DESKTOP, PHONE):
        v = visit(run_folder / "report.html", viewport)
        ids = v.page.eval_on_selector_all("main > section", "s => s.map(e => e.id)")
        assert ids[0] == "diagnosis"
        assert list(SECTIONS) == [i for i in ids if i in SECTIONS]
        top = v.page.eval_on_selector("#diagnosis", "e => e.getBoundingClientRect().top")
        assert 0 <= top < viewport["height"]


def test_each_assumption_links_to_its_evidence(run_folder, visit):
    v = visit(run_folder / "report.html")
    links = v.page.locator("table.verdicts a[href^='#']")
    keys = [links.nth(i).get_attribute("href")[1:] for i in range(links.count())]
    assert len(keys) == 6  # priors, computation, implementation and the recipe's three
    for i, anchor in enumerate(keys):
        v.page.evaluate("window.scrollTo(0, 0)")
        links.nth(i).click()
        v.page.wait_for_function("h => location.hash === h", arg="#" + anchor)
        target = v.page.evaluate("() => document.querySelector(':target')?.id")
        assert target == anchor
        top = v.page.eval_on_selector(f"#{anchor}", "e => e.getBoundingClientRect().top")
        assert -1 <= top < DESKTOP["height"] / 2, f"#{anchor} not scrolled into view (top {top})"


def test_back_link_returns_to_the_diagnosis(run_folder, visit):
    v = visit(run_folder / "report.html")
    last = v.page.locator("article.assumption > details").last
    if last.get_attribute("open") is None:
        last.locator("summary").click()  # a folded assumption opens from its heading
    last.locator("a[href='#diagnosis']").click()
    v.page.wait_for_function("() => location.hash === '#diagnosis'")
    top = v.page.eval_on_selector("#diagnosis", "e => e.getBoundingClientRect().top")
    assert abs(top) <= 1


# --- folds ---------------------------------------------------------------------------


def test_first_screen_holds_the_result_line_and_the_diagnosis_table(run_folder, visit):
    v = visit(run_folder / "report.html", FIRST_SCREEN)
    bottoms = v.page.evaluate("""() => ['#headline', 'table.verdicts'].map(
        s => document.querySelector(s).getBoundingClientRect().bottom)""")
    assert all(0 < b <= FIRST_SCREEN["height"] for b in bottoms), bottoms
    v.page.screenshot(path=artifact("report-first-screen.png"), full_page=False)


def test_evidence_folds_are_open_for_flagged_assumptions_and_closed_for_holds(run_folder, visit):
    v = visit(run_folder / "report.html")
    folds = v.page.eval_on_selector_all(
        "article.assumption > details", "ds => ds.map(d => [d.dataset.verdict, d.open])")
    assert {verdict for verdict, _ in folds} >= {"holds"}
    for verdict, is_open in folds:
        assert is_open == (verdict in ("broken", "doubtful")), (verdict, is_open)


def test_sections_after_the_estimates_are_folded(run_folder, visit):
    v = visit(run_folder / "report.html")
    for section in ("fit", "sampler", "loo", "manifest"):
        assert v.page.eval_on_selector(f"#{section} > details.fold", "d => d.open") is False, section
        assert v.page.locator(f"#{section} > details > summary h2").is_visible()


def test_link_to_a_folded_assumption_opens_its_evidence(run_folder, visit):
    v = visit(run_folder / "report.html")
    held = v.page.eval_on_selector_all(
        "article.assumption > details[data-verdict='holds'] .fold-body", "bs => bs.map(b => b.id)")
    v.page.locator(f"table.verdicts a[href='#{held[0]}']").click()
    v.page.wait_for_function("h => location.hash === h", arg="#" + held[0])
    assert v.page.locator(f"[id='{held[0]}'] table.evidence").is_visible()


def test_print_opens_every_fold(run_folder, visit):
    v = visit(run_folder / "report.html")
    v.page.emulate_media(media="print")
    hidden = v.page.eval_on_selector_all(
        "details.fold:not([open]) > :not(summary)",
        "es => es.filter(e => !e.checkVisibility()).length")
    assert v.page.locator("details.fold:not([open])").count() > 0
    assert hidden == 0


def test_report_does_not_scroll_sideways_at_390_px(run_folder, visit):
    v = visit(run_folder / "report.html", NARROW_PHONE)
    v.page.evaluate("() => document.querySelectorAll('details').forEach(d => d.open = true)")
    page_width, inner = v.page.evaluate(
        "() => [document.scrollingElement.scrollWidth, window.innerWidth]")
    assert page_width <= inner


# --- small screens, greyscale and print -------------------------------------------------


def test_verdict_table_fits_a_phone_screen(run_folder, visit):
    v = visit(run_folder / "report.html", PHONE)
    page_width, inner = v.page.evaluate(
        "() => [document.scrollingElement.scrollWidth, window.innerWidth]")
    assert page_width <= inner
    table = v.page.eval_on_selector("table.verdicts", "t => [t.scrollWidth, t.clientWidth]")
    assert table[0] <= table[1]
    v.page.screenshot(path=artifact("report-phone.png"), full_page=False)


def test_verdict_states_differ_in_words_and_shapes_without_colour(run_folder, visit):
    v = visit(run_folder / "report.html")
    v.page.add_style_tag(content="html { filter: grayscale(1); }")
    # Every badge on the page says its verdict in a word and a shape.
    for cls, text in v.page.eval_on_selector_all(
            ".badge", "bs => bs.map(b => [b.classList[1], b.textContent.trim()])"):
        assert text == f"{BADGES[cls][0]} {BADGES[cls][1]}"
    # The stylesheet draws each of the four states with its own border,
    # so even a badge whose word is cut off stays distinguishable in grey.
    borders = badge_borders(v.page, list(BADGES))
    assert len(set(borders)) == len(BADGES), dict(zip(BADGES, borders))
    v.page.locator("#diagnosis").screenshot(path=artifact("report-greyscale.png"))


def _luminance(rgb: str) -> float:
    """Relative luminance of a CSS ``rgb(r, g, b)`` colour (WCAG 2.1, definition of relative luminance)."""
    channels = [int(c) / 255 for c in re.findall(r"\d+", rgb)[:3]]
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


# WCAG 2.1 success criterion 1.4.3: normal-size text needs a 4.5:1 contrast ratio.
MIN_CONTRAST = 4.5


def test_every_verdict_word_has_enough_contrast(run_folder, visit):
    v = visit(run_folder / "report.html")
    colours = v.page.evaluate(
        """states => states.map(s => {
            const b = document.createElement('span');
            b.className = 'badge ' + s; b.textContent = 'x';
            document.querySelector('#diagnosis td:nth-child(3)').appendChild(b);
            let e = b, bg = 'rgba(0, 0, 0, 0)';
            while (e && (bg === 'rgba(0, 0, 0, 0)' || bg === 'transparent')) {
                bg = getComputedStyle(e).backgroundColor; e = e.parentElement;
            }
            return [getComputedStyle(b).color, bg];
        })""", list(BADGES))
    for state, (fg, bg) in zip(BADGES, colours):
        light, dark = sorted((_luminance(fg), _luminance(bg)), reverse=True)
        assert (light + 0.05) / (dark + 0.05) >= MIN_CONTRAST, (state, fg, bg)


def _pdf_objects(pdf: bytes) -> dict[int, bytes]:
    return {int(n): body for n, body in re.findall(rb"(?s)(\d+) 0 obj\s*(.*?)endobj", pdf)}


def _pdf_pages(objects: dict[int, bytes], node: int) -> list[int]:
    """Page object numbers in reading order, walking the page tree."""
    body = objects[node]
    kids = re.search(rb"/Kids\s*\[([^\]]*)\]", body)
    if kids is None:
        return [node]
    return [p for k in re.findall(rb"(\d+) 0 R", kids.group(1)) for p in _pdf_pages(objects, int(k))]


def named_destinations(pdf: bytes) -> dict[str, tuple[int, float, float]]:
    """``{id: (page number from 1, y of the target, page height)}`` of a Chromium PDF.

    Chromium writes a named destination for every element an in-page link
    points at (PDF 1.7, section 12.3.2.3: ``[page /XYZ left top zoom]``).
    """
    objects = _pdf_objects(pdf)
    catalog = next(b for b in objects.values() if b"/Type /Catalog" in b)
    root = int(re.search(rb"/Pages (\d+) 0 R", catalog).group(1))
    pages = _pdf_pages(objects, root)
    dests = objects[int(re.search(rb"/Dests (\d+) 0 R", catalog).group(1))]
    heights = {}
    for p in pages:
        box = re.search(rb"/MediaBox \[([-\d. ]+)\]", objects[p])
        heights[p] = float(box.group(1).split()[3])
    out = {}
    for name, page, top in re.findall(rb"/([\w.-]+) \[(\d+) 0 R /XYZ [-\d.]+ ([-\d.]+)", dests):
        out[name.decode()] = (pages.index(int(page)) + 1, float(top), heights[int(page)])
    return out


def test_print_starts_each_section_on_a_new_page(run_folder, visit):
    v = visit(run_folder / "report.html")
    pdf = v.page.pdf(format="A4")
    artifact("report.pdf").write_bytes(pdf)
    dests = named_destinations(pdf)
    assert set(SECTIONS) <= set(dests), sorted(dests)
    pages = [dests[s][0] for s in SECTIONS]
    assert pages[0] == 1  # the diagnosis follows the title on the first page
    assert pages == sorted(set(pages)), dict(zip(SECTIONS, pages))  # one page each, in order
    for section in SECTIONS[1:]:
        _, top, height = dests[section]
        assert top >= height - TOP_SLACK_PT, f"section {section} starts {height - top:.0f} pt below the page top"


# --- the comparison and audit pages ------------------------------------------------------------


@pytest.fixture(scope="module")
def companion_pages():
    """compare.html and audit.html of the runs the compare and audit tests share (computed once)."""
    import shared_runs

    code, compared = shared_runs.comparison()
    assert code == 0
    code, audited = shared_runs.funnel_audit()
    assert code in (0, 1)  # 1: a gate failed, which is what this audit is for
    return {"compare": compared / "compare.html", "audit": audited / "audit.html"}


PAGES = ("compare", "audit")


@pytest.mark.parametrize("name", PAGES)
def test_page_loads_without_errors_or_network_requests(companion_pages, visit, name):
    v = visit(companion_pages[name])
    v.page.wait_for_load_state("load")
    assert v.errors == [] and v.refused == []
    assert all(url.startswith(("file://", "data:")) for url in v.requests), v.requests


@pytest.mark.parametrize("name", PAGES)
def test_page_figures_are_visible_and_links_lead_somewhere(companion_pages, visit, name):
    v = visit(companion_pages[name])
    images = v.page.locator("img")
    for i in range(images.count()):
        images.nth(i).scroll_into_view_if_needed()
        assert images.nth(i).evaluate("e => e.complete && e.naturalWidth > 0 && e.getBoundingClientRect().width > 0")
    for href in v.page.eval_on_selector_all("a[href]", "as => as.map(a => a.getAttribute('href'))"):
        if href.startswith("#"):
            assert v.page.locator(f"[id='{href[1:]}']").count() == 1, href
        else:  # a design's or the check's own report beside this page
            assert (companion_pages[name].parent / href).is_file(), href
    v.page.screenshot(path=artifact(f"{name}-desktop.png"), full_page=True)


@pytest.mark.parametrize("name", PAGES)
def test_page_does_not_scroll_sideways_on_a_phone(companion_pages, visit, name):
    v = visit(companion_pages[name], PHONE)
    page_width, inner = v.page.evaluate("() => [document.scrollingElement.scrollWidth, window.innerWidth]")
    assert page_width <= inner
    for widths in v.page.eval_on_selector_all("table.verdicts", "ts => ts.map(t => [t.scrollWidth, t.clientWidth])"):
        assert widths[0] <= widths[1]
    v.page.screenshot(path=artifact(f"{name}-phone.png"), full_page=True)


def badge_borders(page, states: list[str]) -> list[str]:
    """The border style and width the page's stylesheet gives a badge of each state."""
    return page.evaluate(
        """states => states.map(s => {
            const b = document.createElement('span');
            b.className = 'badge ' + s; b.textContent = 'x';
            document.body.appendChild(b);
            const st = getComputedStyle(b);
            return st.borderTopStyle + ' ' + st.borderTopWidth;
        })""", states)


def test_waived_gate_badge_is_drawn_apart_from_doubtful_in_the_audit(companion_pages, visit):
    v = visit(companion_pages["audit"])
    borders = badge_borders(v.page, ["waived", "doubtful", "holds", "broken", "unchecked"])
    assert borders[0] not in borders[1:], borders
