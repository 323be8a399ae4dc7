"""A small learnt-and-scanned demo run shared by the review, labels and baselines tests."""

from __future__ import annotations

import shutil
import sqlite3
import threading
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path

from inspector.cli.main import main
from inspector.config import load_config
from inspector.demo.scenario import generate
from inspector.storage.ledger import Ledger
from inspector.storage.store import Store

#: Small frames keep the tests quick (the defaults are for real cameras).
CONFIG = """
[frames]
long_side = 64
"""


@dataclass
class Run:
    root: Path
    config_path: Path
    store: Store
    source: Path
    out: Path

    @property
    def config(self):
        return load_config(self.config_path)

    def cli(self, *args: str) -> int:
        return main([*args, "--store", str(self.store.root), "--config", str(self.config_path)])


def make_run(root: Path, seed: int = 5) -> Run:
    """Generate a two-camera scenario, learn it, scan the new frames with all scores."""
    scenario = generate(root / "frames", seed=seed, normal_per_camera=24, new_per_camera=12,
                        incident_fraction=0.5, size=(160, 90))
    cfg = root / "inspector.toml"
    cfg.write_text(CONFIG, encoding="utf-8")
    run = Run(root, cfg, Store(root / "store"), scenario.new, root / "out")
    assert run.cli("learn", str(scenario.normal)) == 0
    assert run.cli("scan", str(scenario.new), "--out", str(run.out),
                   "--all-scores", str(run.out / "all_scores.csv")) == 0
    # These tests list single flagged frames; events (which scan also writes) and the ledger
    # rows scan records are set up by the tests that need them.
    (run.out / "events.csv").unlink()
    with sqlite3.connect(run.store.database) as conn:
        conn.execute("DELETE FROM frames")
    conn.close()
    return run


def copy_run(run: Run, root: Path) -> Run:
    """A copy whose store and results can be changed without touching the shared run."""
    shutil.copytree(run.store.root, root / "store")
    shutil.copytree(run.out, root / "out")
    return Run(root, run.config_path, Store(root / "store"), run.source, root / "out")


def write_ledger(database: Path, rows: list[tuple[str, str, float]]) -> None:
    """Scored frames written into the frame ledger as scan and watch record them."""
    t0 = datetime(2026, 12, 1, 8, 0, 0)
    with Ledger(database) as ledger:
        ledger.record([{"path": path, "rel": Path(path).name, "camera": camera,
                        "status": "scored", "score": score, "threshold": 1.0,
                        "flagged": int(score > 1), "version": "v1",
                        "capture_time": t0.isoformat(),
                        "scored_at": (t0 + timedelta(seconds=k)).isoformat()}
                       for k, (path, camera, score) in enumerate(rows)])


@contextmanager
def serving(app, host: str = "127.0.0.1", **options):
    """Serve the review app as the command does, on a free port in a thread; yields the base
    URL."""
    from inspector.review.server import make_server

    server = make_server(app, host, 0, **options)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://{host}:{server.server_port}"
    finally:
        server.shutdown()
        server.server_close()
        thread.join(timeout=10)
