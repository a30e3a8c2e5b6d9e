"""The report page in a real browser: headless Chromium (Debian's /usr/bin/chromium) via playwright.

Checks: the page loads with no console errors or page errors, makes no network request
other than the file itself, the before/after switch changes the shown image, and the
numbers on the page equal report.json.
"""

from __future__ import annotations

import json
import os

import pytest

from fieldfix import report as rp

from _report_fixtures import write_outputs

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not os.path.exists(CHROMIUM), reason=f"{CHROMIUM} is absent (install Debian's chromium package)"),
]


@pytest.fixture(scope="module")
def page_in_browser(tmp_path_factory):
    from playwright.sync_api import sync_playwright

    root = tmp_path_factory.mktemp("browser")
    expected = write_outputs(root)
    html_path = rp.build_report(expected["out"])
    data = json.loads(html_path.with_name("report.json").read_text())
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            context = browser.new_context(viewport={"width": 1366, "height": 768})
            page = context.new_page()
            console, errors, requests = [], [], []
            page.on("console", lambda m: console.append((m.type, m.text)))
            page.on("pageerror", lambda e: errors.append(str(e)))
            context.on("request", lambda r: requests.append(r.url))
            url = html_path.resolve().as_uri()
            page.goto(url, wait_until="load")
            page.wait_for_load_state("networkidle")
            yield {"page": page, "data": data, "url": url, "console": console, "errors": errors,
                   "requests": requests, "root": root}
        finally:
            browser.close()


def test_page_loads_cleanly_without_network(page_in_browser):
    b = page_in_browser
    shot = b["root"] / "screenshot.png"
    b["page"].screenshot(path=str(shot), full_page=True)
    assert shot.stat().st_size > 10_000
    assert b["errors"] == []
    assert [m for m in b["console"] if m[0] in ("error", "warning")] == []
    # data: images are not network requests; the only request is the file itself.
    assert [u for u in b["requests"] if not u.startswith("data:")] == [b["url"]]
    # Every image decoded (a broken data URI has naturalWidth 0).
    widths = b["page"].eval_on_selector_all("img", "imgs => imgs.map(i => i.complete && i.naturalWidth)")
    assert widths and all(w and w > 0 for w in widths)
    assert rp.CAUTION in b["page"].inner_text("#caution")


def test_before_after_switch_changes_the_shown_image(page_in_browser):
    page = page_in_browser["page"]
    box = page.locator("figure.compare").first
    before, after = box.locator('img[data-state="before"]'), box.locator('img[data-state="after"]')
    assert before.is_visible() and not after.is_visible()
    shown_src = before.get_attribute("src")
    box.locator('button[data-show="after"]').click()
    assert after.is_visible() and not before.is_visible()
    assert after.get_attribute("src") != shown_src
    assert box.get_attribute("data-shown") == "after"
    assert box.locator('button[data-show="after"]').get_attribute("aria-pressed") == "true"
    box.locator(".stage").click()  # clicking the picture flips back
    assert before.is_visible() and not after.is_visible()
    box.locator('button[data-show="before"]').click()
    assert before.is_visible()


def test_numbers_in_the_page_equal_report_json(page_in_browser):
    page, data = page_in_browser["page"], page_in_browser["data"]
    cells = page.eval_on_selector_all(
        "[data-key]", "cs => cs.map(c => [c.dataset.key, c.dataset.value, c.dataset.format, c.innerText.trim()])")
    assert len(cells) >= 25
    for key, value_text, fmt, shown in cells:
        value = rp._lookup(data, key)
        if isinstance(value, dict):
            value = json.dumps(value)
        assert json.loads(value_text) == value, key
        assert shown == rp.format_number(value, fmt), key
    run = data["runs"][0]
    shown = page.inner_text('[data-key="runs.0.max_abs_shift_mm"]')
    assert float(shown) == pytest.approx(run["max_abs_shift_mm"], abs=0.005)
    shown = page.inner_text('[data-key="runs.0.folded_voxels"]')
    assert int(shown) == run["folded_voxels"] == 3
    warnings = page.eval_on_selector_all("#warnings li", "ls => ls.map(l => l.dataset.code)")
    assert warnings == [w["code"] for w in data["warnings"]]


def test_page_fits_a_laptop_screen(page_in_browser):
    page = page_in_browser["page"]
    # No horizontal scrolling at 1366 px and the numbers start on the first screen.
    assert page.evaluate("document.documentElement.scrollWidth") <= 1366
    assert page.locator("#numbers").bounding_box()["y"] < 768
