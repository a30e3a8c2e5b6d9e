"""The report page in a real browser: headless Chromium (Debian's /usr/bin/chromium) via playwright.

Checks: the page loads with no console errors (a Content-Security-Policy violation is one)
or page errors and makes no network request but for the file itself; every panel carries
its four orientation letters, placed on its own edges, and its slice position in mm; the
letters agree with the crosshair's world coordinates, also on a grid stored flipped left
to right; the crosshair follows the pointer on every panel of a grid; every number has its
unit beside it (or in its column's header); every text from the dataset (a run named with
a script tag, quotes and dollar signs) is shown literally and runs nothing; the numbers on
the page equal report.json.
"""

from __future__ import annotations

import json
import os
import re

import numpy as np
import pytest

from fieldfix import report as rp

from _report_fixtures import write_outputs

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
#: A run name with everything a page or a figure must not interpret.
HOSTILE = "sub-01_task-<script>alert(\"x\")'$x^2$_bold"
HOSTILE_TITLE = "<b>study</b> \"q\" 'a' $\\frac{1}{2}$ & more"

pytestmark = [
    pytest.mark.browser,
    pytest.mark.slow,
    pytest.mark.skipif(not os.path.exists(CHROMIUM),
                       reason=f"{CHROMIUM} is absent (install Debian's chromium package)"),
]


def _flipped_affine():
    a = np.diag([-2.5, 2.5, 3.0, 1.0])
    a[:3, 3] = [30.0, -35.0, -15.0]  # voxel i = 0 lies at the subject's right
    return a


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    from playwright.sync_api import sync_playwright

    root = tmp_path_factory.mktemp("browser")
    expected = write_outputs(root / "study", stem=HOSTILE)
    flipped = write_outputs(root / "flipped", grid=_flipped_affine(), with_dropout=False, with_plan=False)
    pages = {"study": rp.build_report(expected["out"], title=HOSTILE_TITLE),
             "flipped": rp.build_report(flipped["out"])}
    with sync_playwright() as pw:
        chromium = pw.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            yield {"chromium": chromium, "pages": pages, "root": root}
        finally:
            chromium.close()


def _open(browser, name):
    context = browser["chromium"].new_context(viewport={"width": 1366, "height": 768})
    page = context.new_page()
    log = {"console": [], "errors": [], "requests": [], "dialogs": []}
    page.on("console", lambda m: log["console"].append((m.type, m.text)))
    page.on("pageerror", lambda e: log["errors"].append(str(e)))
    page.on("dialog", lambda d: (log["dialogs"].append(d.message), d.dismiss()))
    context.on("request", lambda r: log["requests"].append(r.url))
    path = browser["pages"][name]
    url = path.resolve().as_uri()
    page.goto(url, wait_until="load")
    page.wait_for_load_state("networkidle")
    data = json.loads(path.with_name("report.json").read_text())
    return page, log, url, data


@pytest.fixture(scope="module")
def study(browser):
    return _open(browser, "study")


def test_page_loads_cleanly_without_network(study, browser):
    page, log, url, _ = study
    page.screenshot(path=str(browser["root"] / "screenshot.png"), full_page=True)
    assert (browser["root"] / "screenshot.png").stat().st_size > 10_000
    assert log["errors"] == [] and log["dialogs"] == []
    assert [m for m in log["console"] if m[0] in ("error", "warning")] == []  # CSP violations are errors
    assert [u for u in log["requests"] if not u.startswith("data:")] == [url]
    widths = page.eval_on_selector_all("img", "imgs => imgs.map(i => i.complete && i.naturalWidth)")
    assert widths and all(w and w > 0 for w in widths)
    assert rp.CAUTION in page.inner_text("#caution")
    assert page.evaluate("document.querySelectorAll('script').length") == 1
    assert page.evaluate("document.documentElement.scrollWidth") <= 1366
    assert page.locator("#glance").bounding_box()["y"] < 768 / 2


def test_every_panel_has_its_orientation_letters_and_position(study):
    page, _, _, _ = study
    panels = page.eval_on_selector_all(".panel", """ps => ps.map(p => {
        const box = p.getBoundingClientRect();
        const at = cls => { const e = p.querySelector(cls); const b = e.getBoundingClientRect();
                            return [e.innerText, (b.x + b.width / 2 - box.x) / box.width,
                                    (b.y + b.height / 2 - box.y) / box.height]; };
        return {left: at('.edge-left'), right: at('.edge-right'), top: at('.edge-top'),
                bottom: at('.edge-bottom'), where: p.querySelector('.where').innerText};
    })""")
    assert len(panels) >= 20
    for p in panels:
        assert [p[e][0] for e in ("left", "right", "top", "bottom")] == ["L", "R", "A", "P"]
        assert p["left"][1] < 0.15 and p["right"][1] > 0.85 and p["top"][2] < 0.15 and p["bottom"][2] > 0.85
        assert re.fullmatch(r"z = -?\d+\.\d mm", p["where"]), p["where"]


def _hover(page, grid_id, fx, fy, panel=0):
    target = page.locator(f"#{grid_id} .panel").nth(panel)
    target.scroll_into_view_if_needed()
    box = target.bounding_box()
    target.hover(position={"x": fx * box["width"], "y": fy * box["height"]}, force=True)
    return page.inner_text(f"#{grid_id} .xyz")


def test_crosshair_follows_the_pointer_on_every_panel_of_a_grid(study):
    page, _, _, _ = study
    assert page.locator("#run0 .panel.crossed").count() == page.locator("#run0 .panel").count()  # set at the profile
    text = _hover(page, "run0", 0.25, 0.5, panel=1)
    lefts = page.eval_on_selector_all("#run0 .hair.v", "hs => hs.map(h => h.style.left)")
    tops = page.eval_on_selector_all("#run0 .hair.h", "hs => hs.map(h => h.style.top)")
    assert len(set(lefts)) == 1 and len(set(tops)) == 1 and float(lefts[0].rstrip("%")) == pytest.approx(25, abs=1)
    assert re.fullmatch(r"[LR] \d+\.\d mm \u00b7 [AP] \d+\.\d mm \u00b7 [SI] \d+\.\d mm", text), text


@pytest.mark.parametrize("name", ["study", "flipped"])
def test_letters_agree_with_world_coordinates(browser, name):
    # Left of the picture is the subject's left (negative x) and the top is anterior
    # (positive y), whatever order the voxels are stored in.
    page, _, _, data = _open(browser, name)
    grid = "run0"
    right = _hover(page, grid, 0.97, 0.5)
    left = _hover(page, grid, 0.03, 0.5)
    top = _hover(page, grid, 0.5, 0.03)
    bottom = _hover(page, grid, 0.5, 0.97)
    def signed(text, index, positive):
        part = text.split("\u00b7")[index].split()
        return float(part[1]) * (1 if part[0] == positive else -1)

    assert signed(right, 0, "R") > signed(left, 0, "R") and signed(top, 1, "A") > signed(bottom, 1, "A")
    assert page.inner_text(f"#{grid} .panel >> nth=0 >> .edge-right") == "R"


def test_every_number_has_its_unit(study):
    page, _, _, _ = study
    missing = page.eval_on_selector_all("[data-key]", """cells => cells.filter(c => {
        const q = c.closest('.quantity');
        if (q) { const u = q.querySelector('.unit'); return !u || !u.innerText.trim(); }
        const td = c.closest('td');
        if (td && td.closest('table.protocols')) {
            const th = td.closest('table').querySelectorAll('thead th')[td.cellIndex];
            return !(th.dataset.unit || c.innerText.trim() === 'n/a' || isNaN(parseFloat(c.innerText)));
        }
        if (td && td.closest('#overview')) return false;  /* units in the column headers */
        return true;
    }).map(c => c.dataset.key)""")
    assert missing == []
    # The captions state their numbers with units too (or as ordinals, or counts of things).
    captions = page.eval_on_selector_all("figcaption", "fs => fs.map(f => f.innerText)")
    unit = re.compile(r"(st|nd|rd|th)\b|\s?(Hz|mm|ms|s\b|%|voxels?\b|protocols?\b|slices?\b|\(fraction)")
    for caption in captions:
        for match in re.finditer(r"[-+\u00b1]?\d+(?:\.\d+)?(?![\d.])", caption):
            assert unit.match(caption, match.end()), (caption, match.group(0))


def test_dataset_text_is_shown_literally_and_runs_nothing(study):
    page, log, _, data = study
    assert log["dialogs"] == []
    assert page.evaluate("document.querySelectorAll('script').length") == 1
    no_markup = "h1 *, title *, #q-field h3 *, #q-correction h3 *"
    assert page.evaluate(f"document.querySelectorAll('{no_markup}').length") == 0  # no markup got through
    assert page.inner_text("#title") == HOSTILE_TITLE
    assert page.title() == HOSTILE_TITLE
    headings = page.eval_on_selector_all("h3", "hs => hs.map(h => h.innerText)")
    assert f"Run {HOSTILE}" in headings
    assert data["runs"][0]["stem"] == HOSTILE


def test_numbers_in_the_page_equal_report_json(study):
    page, _, _, data = study
    cells = page.eval_on_selector_all(
        "[data-key]", "cs => cs.map(c => [c.dataset.key, c.dataset.value, c.dataset.format, c.dataset.scale, "
                      "c.innerText.trim()])")
    assert len(cells) >= 60
    for key, value_text, fmt, scale, shown in cells:
        value = rp.lookup(data, key)
        assert json.loads(value_text) == value, key
        assert shown == rp.format_number(value, fmt, float(scale)), key
    shown = page.inner_text('[data-key="runs.0.max_abs_shift_mm"]')
    assert float(shown) == pytest.approx(data["runs"][0]["max_abs_shift_mm"], abs=0.005)
    warnings = page.eval_on_selector_all("#warnings li", "ls => ls.map(l => l.dataset.code)")
    assert warnings == [w["code"] for w in data["warnings"]]
