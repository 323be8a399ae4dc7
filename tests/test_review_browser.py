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
        # Label the selected item with the keyboard: "2" = false alarm, then it moves on.
        with page.expect_navigation():
            page.keyboard.press("2")
        assert page.locator("#labelling").get_attribute("data-item") != first
        page.reload()
        badge = page.locator(f'#items li[data-item="{first}"] .badge')
        assert badge.inner_text() == "false alarm"
        assert page.locator("#items li.row .cam").all_inner_texts()[0] == camera
        # The label is in the store, and the pictures of the item load.
        conn = connect(run.store.database)
        assert [x.label for x in read(conn)] == ["false_alarm"]
        conn.close()
        page.keyboard.press("k")
        page.wait_for_load_state("networkidle")
        sizes = page.eval_on_selector_all(".pictures img", "els => els.map(e => e.naturalWidth)")
        assert len(sizes) == 3 and all(w > 0 for w in sizes)
        assert errors == []
        page.close()
