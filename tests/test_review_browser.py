"""The review page in a real browser: headless Chromium (Debian package) driven by Playwright."""

from __future__ import annotations

import os
import shutil

import pytest
from _review_run import make_run, serving

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(
    CHROMIUM is None, reason="no chromium on PATH (make test installs the Debian package "
                             "'chromium'; Playwright's own browser download is not used)")

ARGS = ["--headless", "--disable-gpu", "--no-first-run", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]


def luminance(css: str) -> float:
    """WCAG 2.1 relative luminance of a CSS ``rgb(r, g, b)`` colour."""
    r, g, b = (int(v) / 255 for v in css[css.index("(") + 1:css.index(")")].split(",")[:3])

    def lin(c: float) -> float:
        return c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4

    return 0.2126 * lin(r) + 0.7152 * lin(g) + 0.0722 * lin(b)


@pytest.fixture(scope="module")
def browser():
    sync_api = pytest.importorskip("playwright.sync_api")
    args = ARGS + (["--no-sandbox"] if os.geteuid() == 0 else [])
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=args)
        yield b
        b.close()


def test_filter_label_with_keyboard_and_reload(browser, tmp_path):
    from inspector.review.server import create_app
    from inspector.storage.labels import connect, read

    run = make_run(tmp_path)
    app = create_app(run.out, run.store, run.config)
    with serving(app) as url:
        page = browser.new_page(viewport={"width": 1300, "height": 900})
        errors = []
        page.on("pageerror", lambda e: errors.append(str(e)))
        page.goto(url + "/")
        total = page.locator("#items li.row").count()
        assert total > 0
        cameras = page.locator("#items li.row .cam").all_inner_texts()
        camera = max(set(cameras), key=cameras.count)
        # Filter by camera: the select submits the form as soon as it changes.
        with page.expect_navigation():
            page.select_option("#f-camera", camera)
        rows = page.locator("#items li.row")
        assert rows.count() == cameras.count(camera)
        assert set(page.locator("#items li.row .cam").all_inner_texts()) == {camera}
        first = rows.first.get_attribute("data-item")
        assert page.locator("#labelling").get_attribute("data-item") == first
        # Nothing reviewed yet: neutral "to review" badges and rings, no red anywhere.
        assert set(rows.locator(".badge").all_inner_texts()) == {"to review"}
        flagged = page.locator("svg.timeline circle.pt.flagged")
        assert flagged.count() > 0 and page.locator("circle.pt.incident").count() == 0
        assert page.locator("text=all cameras").count() == 0  # the drop-down does that
        assert page.locator("form#filters button:visible").count() == 0  # no "Apply"
        # Label the selected item with the keyboard: "2" = false alarm, then it moves on.
        with page.expect_navigation():
            page.keyboard.press("2")
        second = page.locator("#labelling").get_attribute("data-item")
        assert second != first
        with page.expect_navigation():
            page.keyboard.press("1")  # the second one is an incident
        page.reload()
        badge = page.locator(f'#items li[data-item="{first}"] .badge')
        assert badge.inner_text() == "false alarm"
        red = page.locator(f'#items li[data-item="{second}"] .badge')
        assert red.inner_text() == "incident"
        assert page.locator("#items li.row .cam").all_inner_texts()[0] == camera
        # Colours: red only for the incident; the false alarm differs from it in lightness
        # too, so the two stay apart without red-green vision (relative luminance as WCAG 2.1
        # defines it, https://www.w3.org/TR/WCAG21/#dfn-relative-luminance).
        lum = {}
        for name, loc in (("incident", red), ("false_alarm", badge),
                          ("flagged", flagged.first)):
            prop = "fill" if name == "flagged" else "background-color"
            rgb = loc.evaluate(f"e => getComputedStyle(e)['{prop}']")
            lum[name] = luminance(rgb)
        assert lum["false_alarm"] - lum["incident"] > 0.4
        assert lum["flagged"] > 0.9  # the to-review ring is white inside, not red
        assert page.locator("svg.timeline circle.pt.incident").count() == 1
        assert page.locator("svg.timeline circle.pt.false_alarm").count() == 1
        # plain words under the expected picture, the model's own name in its tooltip
        page.goto(url + f"/?item={first}")
        assert page.locator("figcaption.expected").inner_text() == \
            "what this camera normally shows here"
        assert "PPCA" in page.locator(".pictures img").nth(2).get_attribute("title")
        # The labels are in the store, and the pictures of the item load.
        conn = connect(run.store.database)
        assert sorted(x.label for x in read(conn)) == ["false_alarm", "incident"]
        conn.close()
        page.wait_for_load_state("networkidle")
        sizes = page.eval_on_selector_all(".pictures img", "els => els.map(e => e.naturalWidth)")
        assert len(sizes) == 3 and all(w > 0 for w in sizes)
        # Switching the active baseline: the comparison first, then a confirming button.
        shutil.copytree(run.store.root / camera / "v1", run.store.root / camera / "v2")
        page.goto(url + f"/?camera={camera}")
        page.click('button.compare[data-version="v2"]')
        confirm = page.locator('button.activate[data-version="v2"]')
        confirm.wait_for(state="visible")
        shown = page.locator("td.switch .compare-out").inner_text()
        assert "v2" in shown or "nothing to compare" in shown
        assert run.store.active_version(camera) == "v1"  # nothing switched yet
        if os.environ.get("REVIEW_SCREENSHOT"):
            page.screenshot(path=os.environ["REVIEW_SCREENSHOT"], full_page=True)
        with page.expect_navigation():
            confirm.click()
        assert run.store.active_version(camera) == "v2"
        assert page.locator("table tr.active td").first.inner_text() == "v2"
        assert errors == []
        page.close()
