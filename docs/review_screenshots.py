"""Make the README's screenshots of the review page from a demo run.

    .venv/bin/python docs/review_screenshots.py [WORKDIR]

Generates a small depot scenario, learns it, scans it, labels a few flags, serves the page
on 127.0.0.1 and photographs it with headless Chromium (Debian package) via Playwright.
Writes docs/review-list.png and docs/review-item.png.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import sys
import tempfile
import urllib.request
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE.parent / "tests"))

from _review_run import Run, serving  # noqa: E402

from inspector.demo.scenario import generate  # noqa: E402
from inspector.review.server import create_app  # noqa: E402
from inspector.storage.store import Store  # noqa: E402

ARGS = ["--headless", "--disable-gpu", "--no-first-run", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]


def demo_run(root: Path) -> Run:
    scenario = generate(root / "frames", seed=11, normal_per_camera=120, new_per_camera=48,
                        incident_fraction=0.25, size=(480, 270))
    cfg = root / "inspector.toml"
    cfg.write_text("[frames]\nlong_side = 160\n", encoding="utf-8")
    run = Run(root, cfg, Store(root / "store"), scenario.new, root / "out")
    assert run.cli("learn", str(scenario.normal)) == 0
    assert run.cli("scan", str(scenario.new), "--out", str(run.out),
                   "--all-scores", str(run.out / "all_scores.csv")) == 0
    return run


def label(url: str, token: str, item: str, value: str, note: str = "") -> None:
    req = urllib.request.Request(f"{url}/api/label", method="POST",
                                 data=json.dumps({"item": item, "label": value,
                                                  "note": note}).encode(),
                                 headers={"Content-Type": "application/json",
                                          "X-Review-Token": token})
    urllib.request.urlopen(req).read()


def main_() -> int:
    from playwright.sync_api import sync_playwright

    work = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="review-"))
    run = demo_run(work)
    token = "screenshot"
    app = create_app(run.out, run.store, run.config, token=token)
    items = sorted(app.extensions["inspector_review"].results.frames, key=lambda i: -i.score)
    args = ARGS + (["--no-sandbox"] if os.geteuid() == 0 else [])
    logging.getLogger("werkzeug").setLevel(logging.WARNING)
    with serving(app) as url, sync_playwright() as p:
        for it, (value, note) in zip(items[1:4], [("incident", "parcel left in the lane"),
                                                  ("false_alarm", "sun patch on the floor"),
                                                  ("unsure", "")]):
            label(url, token, it.id, value, note)
        browser = p.chromium.launch(executable_path=shutil.which("chromium"), args=args)
        page = browser.new_page(viewport={"width": 1280, "height": 1000})
        page.goto(f"{url}/?item={items[0].id}")
        page.wait_for_load_state("networkidle")
        page.screenshot(path=str(HERE / "review-list.png"))
        page.locator(".detail").screenshot(path=str(HERE / "review-item.png"))
        browser.close()
    print(f"wrote {HERE / 'review-list.png'} and {HERE / 'review-item.png'} (run in {work})")
    return 0


if __name__ == "__main__":
    sys.exit(main_())
