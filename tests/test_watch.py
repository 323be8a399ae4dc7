"""The watcher: exactly-once scoring of a live folder, restarts, bad input, the ledger and
events.

The reference of every exactly-once check is the list of files the test itself wrote
(common practice, no source): each must end with one ledger row and one CSV row.
"""

from __future__ import annotations

import csv
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from collections import Counter
from pathlib import Path

import cv2
import numpy as np
import pytest

from inspector.cli import main as cli
from inspector.core.events import EventSettings, FramePoint, group_events
from inspector.errors import UsageError
from inspector.storage.frames import discover

ROOT = Path(__file__).resolve().parents[1]
W, H = 64, 48


def frame_bytes(seed: int, anomaly: bool = False) -> bytes:
    """A tiny PNG of the test scene: fixed texture plus noise (a white square if anomaly)."""
    base = (np.random.default_rng(123).random((H, W, 3)) * 200).astype(np.uint8)
    rng = np.random.default_rng(seed)
    img = np.clip(base.astype(int) + rng.normal(0, 5, base.shape), 0, 255).astype(np.uint8)
    if anomaly:
        img[10:30, 20:44] = 255
    ok, buf = cv2.imencode(".png", img)
    assert ok
    return buf.tobytes()


def name(camera: str, i: int) -> str:
    return f"{camera}_20260105_{i // 3600:02d}{i // 60 % 60:02d}{i % 60:02d}.png"


def learnt_site(base: Path, cameras, watch: str, new=()) -> Path:
    """Under ``base``: a small config (64 px frames, 2 folds, ``[watch]`` keys ``watch``),
    20 normal frames of each camera learnt into ``base/store`` and the frames ``new`` of
    each camera in ``base/new``. Returns the config file."""
    cfg = base / "inspector.toml"
    cfg.write_text(f"[frames]\nlong_side = 64\n[calibration]\nfolds = 2\n[watch]\n{watch}",
                   encoding="utf-8")
    for part, indices in (("normal", range(20)), ("new", new)):
        for cam in cameras:
            for i in indices:
                (base / part / cam).mkdir(parents=True, exist_ok=True)
                (base / part / cam / name(cam, i)).write_bytes(frame_bytes(1000 + i))
    assert cli.main(["learn", str(base / "normal"), "--store", str(base / "store"),
                     "--config", str(cfg)]) == 0
    return cfg


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    """A store with baselines for cameras dock and aisle, and a small config."""
    base = tmp_path_factory.mktemp("watch")
    cfg = learnt_site(base, ("dock", "aisle"), "settle = 1.0\nworkers = 2\n")
    return {"base": base, "cfg": cfg, "store": base / "store", "normal": base / "normal"}


@pytest.fixture
def env(setup, tmp_path):
    """A fresh source, output folder and store copy (with both baselines) per test."""
    import shutil

    store = tmp_path / "store"
    shutil.copytree(setup["store"], store)
    src = tmp_path / "src"
    src.mkdir()
    return {"src": src, "out": tmp_path / "out", "all": tmp_path / "all.csv", "store": store,
            "cfg": setup["cfg"], "normal": setup["normal"], "tmp": tmp_path}


def watch_args(env, *extra) -> list[str]:
    return ["watch", str(env["src"]), "--store", str(env["store"]), "--config",
            str(env["cfg"]), "--out", str(env["out"]), "--all-scores", str(env["all"]), *extra]


def run_watch(env, writer=None, idle: float = 2.0, *extra) -> int:
    """Run the watch command in this process until idle, while ``writer`` adds files."""
    t = threading.Thread(target=writer) if writer else None
    if t:
        t.start()
    try:
        return cli.main(watch_args(env, "--idle-exit", str(idle), *extra))
    finally:
        if t:
            t.join()


def ledger_rows(env) -> dict[str, sqlite3.Row]:
    con = sqlite3.connect(env["store"] / "inspector.sqlite")
    con.row_factory = sqlite3.Row
    try:
        return {r["rel"]: r for r in con.execute("SELECT * FROM frames")}
    finally:
        con.close()


def csv_rows(path: Path) -> list[dict]:
    if not path.exists():
        return []
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def check_agree(env) -> dict[str, sqlite3.Row]:
    """Ledger and CSV files agree: each scored frame once in all-scores, each flagged frame
    once in flagged.csv, each skipped frame once in skipped.csv, and nothing else."""
    rows = ledger_rows(env)
    scored = {k for k, r in rows.items() if r["status"] == "scored"}
    flagged = {k for k, r in rows.items() if r["status"] == "scored" and r["flagged"]}
    skipped = {k for k, r in rows.items() if r["status"] == "skipped"}
    all_scores = Counter(r["frame"] for r in csv_rows(env["all"]))
    assert all(n == 1 for n in all_scores.values()), all_scores.most_common(3)
    assert set(all_scores) == scored
    flagged_csv = Counter(r["frame"] for r in csv_rows(env["out"] / "flagged.csv"))
    assert all(n == 1 for n in flagged_csv.values())
    assert set(flagged_csv) == flagged
    skipped_csv = Counter(r["frame"] for r in csv_rows(env["out"] / "skipped.csv"))
    assert all(n == 1 for n in skipped_csv.values())
    assert set(skipped_csv) == skipped
    for r in csv_rows(env["all"]):  # CSV values are the ledger's
        led = rows[r["frame"]]
        assert r["baseline"] == led["version"] and r["time"] == led["capture_time"]
        assert float(r["score"]) == pytest.approx(led["score"], abs=1e-4)
    return rows


def write_frames(folder: Path, camera: str, indices, pause: float = 0.0, anomalies=()):
    (folder / camera).mkdir(parents=True, exist_ok=True)
    for i in indices:
        (folder / camera / name(camera, i)).write_bytes(frame_bytes(i, i in anomalies))
        if pause:
            time.sleep(pause)


# --- events: the grouping rule -------------------------------------------------------------

def test_group_events_k_of_n_with_gap():
    # Expected events worked by hand from the rule stated in inspector/events.py.
    flags = [0, 1, 1, 0, 1, 0, 0, 1, 0, 0, 0, 1, 1, 1]
    pts = [FramePoint("dock", f"2026-01-01T00:00:{i:02d}", f"dock/{i}.png", float(i), bool(f))
           for i, f in enumerate(flags)]
    ev = group_events(pts, EventSettings(k=1, n=1, gap=1))
    assert [(e.start[-2:], e.end[-2:], e.frames) for e in ev] == [
        ("01", "04", 3), ("07", "07", 1), ("11", "13", 3)]
    assert [e.event for e in ev] == ["dock-0001", "dock-0002", "dock-0003"]
    assert ev[0].peak_frame == "dock/4.png" and ev[0].peak_score == 4.0
    ev = group_events(pts, EventSettings(k=2, n=3, gap=0))
    # frame 7 alone never has 2 of the last 3 flagged; frames 11-13 open at frame 12
    assert [(e.start[-2:], e.end[-2:], e.frames) for e in ev] == [
        ("01", "02", 2), ("11", "13", 3)]
    # order of input does not matter; cameras are grouped apart
    other = [FramePoint("aisle", p.time, p.frame, p.score, p.flagged) for p in pts]
    ev2 = group_events(list(reversed(pts)) + other, EventSettings())
    assert [e.camera for e in ev2].count("aisle") == 3 and len(ev2) == 6


# --- scan records the ledger ----------------------------------------------------------------

def test_scan_records_ledger_and_events(env):
    write_frames(env["src"], "dock", range(6), anomalies={2, 3})
    write_frames(env["src"], "gate", range(2))  # no baseline
    (env["src"] / "dock" / "junk.jpg").write_text("not an image")
    args = ["scan", str(env["src"]), "--store", str(env["store"]), "--config", str(env["cfg"]),
            "--out", str(env["out"]), "--all-scores", str(env["all"])]
    assert cli.main(args) == 0
    rows = ledger_rows(env)
    assert Counter(r["status"] for r in rows.values()) == {"scored": 6, "waiting": 2,
                                                           "skipped": 1}
    assert {k for k, r in rows.items() if r["flagged"]} == {f"dock/{name('dock', 2)}",
                                                           f"dock/{name('dock', 3)}"}
    ev = csv_rows(env["out"] / "events.csv")
    assert [(e["event"], e["flagged_frames"], e["peak_frame"]) for e in ev][0][:2] == ("dock-0001", "2")
    assert cli.main(args) == 0  # a re-scan updates rows, never adds
    assert len(ledger_rows(env)) == 9


# --- live watching ----------------------------------------------------------------------------

def test_catch_up_then_live_with_events(env, capsys):
    write_frames(env["src"], "dock", range(10), anomalies={4, 5, 6})

    def writer():
        time.sleep(0.5)
        write_frames(env["src"], "aisle", range(10), pause=0.02)

    assert run_watch(env, writer) == 0
    # the baselines of the cameras present are loaded before watching starts (only dock
    # has a folder yet), so the first frames do not queue behind the loading
    assert "1 baseline loaded" in capsys.readouterr().out
    rows = check_agree(env)
    assert len(rows) == 20 and all(r["status"] == "scored" for r in rows.values())
    ev = csv_rows(env["out"] / "events.csv")
    assert list(ev[0]) == ["event", "camera", "start", "end", "flagged_frames", "peak_frame",
                           "peak_score", "since"]
    assert [(e["camera"], e["flagged_frames"]) for e in ev] == [("dock", "3")]
    for r in csv_rows(env["out"] / "flagged.csv"):
        assert Path(r["overlay"]).is_file()
    # a second run finds nothing new: no frame is scored twice
    assert run_watch(env, None, 1.0) == 0
    assert "scored 0 frames" in capsys.readouterr().out
    check_agree(env)


def test_slowly_written_files_are_never_read_half_written(env):
    data = [frame_bytes(i) for i in range(4)]

    def writer():
        (env["src"] / "dock").mkdir()
        for i, d in enumerate(data):
            with open(env["src"] / "dock" / name("dock", i), "wb") as fh:
                for k in range(0, len(d), len(d) // 6 + 1):
                    fh.write(d[k:k + len(d) // 6 + 1])
                    fh.flush()
                    time.sleep(0.05)  # well under the 1 s settle interval

    assert run_watch(env, writer) == 0
    rows = check_agree(env)
    assert len(rows) == 4
    for i, d in enumerate(data):
        r = rows[f"dock/{name('dock', i)}"]
        assert r["status"] == "scored" and r["size"] == len(d)


def test_write_then_rename_and_temporary_names(env):
    def writer():
        (env["src"] / "dock").mkdir()
        for i in range(5):
            tmp = env["src"] / "dock" / (f".{i}.png" if i % 2 else f"{name('dock', i)}.part")
            tmp.write_bytes(frame_bytes(i)[:100])  # a partial file under a temporary name
            time.sleep(0.3)
            tmp.write_bytes(frame_bytes(i))
            os.replace(tmp, env["src"] / "dock" / name("dock", i))

    assert run_watch(env, writer) == 0
    rows = check_agree(env)
    assert sorted(rows) == sorted(f"dock/{name('dock', i)}" for i in range(5))
    assert all(r["status"] == "scored" for r in rows.values())


def test_files_deleted_right_after_creation(env):
    def writer():
        (env["src"] / "dock").mkdir()
        for i in range(20):
            p = env["src"] / "dock" / name("dock", 100 + i)
            p.write_bytes(frame_bytes(i))
            p.unlink()
        write_frames(env["src"], "dock", range(3))

    assert run_watch(env, writer) == 0
    rows = check_agree(env)
    assert {k for k, r in rows.items() if r["status"] == "scored"} == {
        f"dock/{name('dock', i)}" for i in range(3)}
    for r in rows.values():
        if r["status"] == "skipped":
            assert "deleted" in r["reason"] or "disappeared" in r["reason"]


def test_burst_of_2000_frames(env):
    data = frame_bytes(7)

    def writer():
        for cam in ("dock", "aisle"):
            (env["src"] / cam).mkdir()
        for i in range(1000):
            for cam in ("dock", "aisle"):
                (env["src"] / cam / name(cam, i)).write_bytes(data)

    assert run_watch(env, writer) == 0
    rows = check_agree(env)
    assert len(rows) == 2000 and all(r["status"] == "scored" for r in rows.values())


def test_new_camera_without_baseline_waits_then_is_scored(env):
    write_frames(env["src"], "gate", range(12))
    assert run_watch(env, None, 1.0) == 0
    rows = ledger_rows(env)
    assert {r["status"] for r in rows.values()} == {"waiting"}
    assert "no baseline" in next(iter(rows.values()))["reason"]
    # learn gate while a watcher runs: the waiting frames are scored without a restart
    normal = env["tmp"] / "gate-normal"
    write_frames(normal, "gate", range(1000, 1020))

    def learner():
        time.sleep(0.5)
        assert cli.main(["learn", str(normal), "--store", str(env["store"]), "--config",
                         str(env["cfg"])]) == 0

    assert run_watch(env, learner, 8.0) == 0
    rows = check_agree(env)
    assert len(rows) == 12 and {r["status"] for r in rows.values()} == {"scored"}


def covered_bytes(seed: int) -> bytes:
    """The test scene with most of the lens covered by something dark and soft, as
    inspector.demo.scenario draws a hand over the lens (tests/test_conditions.py)."""
    img = cv2.imdecode(np.frombuffer(frame_bytes(seed), np.uint8), cv2.IMREAD_COLOR)
    img[:, : W * 9 // 10] = 20
    ok, buf = cv2.imencode(".png", cv2.GaussianBlur(img, (0, 0), 2.0))
    assert ok
    return buf.tobytes()


def test_watch_writes_health_rows_for_a_covered_lens(env, capsys):
    """health.csv is written under watch as under scan (one writer), and status shows it;
    so are the frames judged with amplified noise (one of them at half the light)."""
    write_frames(env["src"], "dock", range(3))
    (env["src"] / "dock" / name("dock", 3)).write_bytes(covered_bytes(3))
    dark = cv2.imdecode(np.frombuffer(frame_bytes(4), np.uint8), cv2.IMREAD_COLOR) // 2
    (env["src"] / "dock" / name("dock", 4)).write_bytes(cv2.imencode(".png", dark)[1])
    assert run_watch(env, None, 1.0) == 0
    rows = check_agree(env)
    amplified = {r["frame"]: r["noise_amplified"] for r in csv_rows(env["all"])
                 if r["noise_amplified"]}
    assert float(amplified[f"dock/{name('dock', 4)}"]) > 1.5  # about twice the gain
    for frame, value in amplified.items():  # the ledger keeps it for a crash recovery
        assert rows[frame]["noise_amplified"] == pytest.approx(float(value), abs=1e-4)
    n = len(amplified)
    assert (f"warning: {n} frame{'' if n == 1 else 's'} of dock: darker than every normal frame"
            in capsys.readouterr().out)
    health = csv_rows(env["out"] / "health.csv")
    covered = f"dock/{name('dock', 3)}"
    assert "lens covered" in {r["condition"] for r in health if r["frame"] == covered}
    assert {r["frame"] for r in health} == {covered}
    st = subprocess.run([sys.executable, "-m", "inspector", "status", "--store",
                         str(env["store"]), "--out", str(env["out"])], cwd=ROOT,
                        capture_output=True, text=True, check=False)
    assert st.returncode == 0 and "lens covered" in st.stdout, st.stdout + st.stderr


def test_bad_files_during_watch_are_recorded(env):
    def writer():
        write_frames(env["src"], "dock", range(2))
        d = env["src"] / "dock"
        (d / "notes.jpg").write_text("hello")
        (d / "empty.png").write_bytes(b"")
        (d / "cut.png").write_bytes(frame_bytes(3)[:200])
        (env["src"] / "loose.png").write_bytes(frame_bytes(4))  # not in a camera folder
        write_frames(env["src"], "dock", range(2, 4))

    assert run_watch(env, writer) == 0
    rows = check_agree(env)
    reasons = {k: r["reason"] for k, r in rows.items() if r["status"] == "skipped"}
    assert set(reasons) == {"dock/notes.jpg", "dock/empty.png", "dock/cut.png", "loose.png"}
    assert "truncated" in reasons["dock/cut.png"] and "camera folder" in reasons["loose.png"]
    assert sum(r["status"] == "scored" for r in rows.values()) == 4


def test_a_link_that_points_to_nothing_is_recorded_as_scan_records_it(env):
    # scan records a dangling symbolic link in skipped.csv (storage/frames.discover); watch
    # records it too, with the same reason, whether it was there at start or came later.
    d = env["src"] / "dock"
    d.mkdir()
    (d / "before.png").symlink_to(env["tmp"] / "gone.png")  # outside the folder

    def writer():
        write_frames(env["src"], "dock", range(2))
        (d / "later.png").symlink_to(d / "nothing.png")  # inside the folder, to nothing
        write_frames(env["src"], "dock", range(2, 4))

    assert run_watch(env, writer) == 0
    rows = check_agree(env)
    reasons = {k: r["reason"] for k, r in rows.items() if r["status"] == "skipped"}
    assert reasons == {s.rel: s.reason for s in discover(env["src"])[1]}
    assert reasons == {"dock/before.png": "link leads outside the scanned folder",
                       "dock/later.png": "link points to nothing"}
    assert sum(r["status"] == "scored" for r in rows.values()) == 4


def test_polling_mode(env):
    def writer():
        time.sleep(0.3)
        write_frames(env["src"], "dock", range(5), pause=0.05)
        tmp = env["src"] / "dock" / "x.tmp"
        tmp.write_bytes(frame_bytes(9))
        os.replace(tmp, env["src"] / "dock" / name("dock", 9))

    assert run_watch(env, writer, 3.0, "--poll", "0.3") == 0
    rows = check_agree(env)
    assert len(rows) == 6 and {r["status"] for r in rows.values()} == {"scored"}


def test_reconcile_after_crash_between_ledger_and_csv(env):
    write_frames(env["src"], "dock", range(8), anomalies={1})
    assert run_watch(env, None, 1.0) == 0
    db = sqlite3.connect(env["store"] / "inspector.sqlite")
    lines = env["all"].read_text(encoding="utf-8").splitlines(keepends=True)
    # crash after the ledger commit, before the CSV rows: rows 1-3 are missing from the CSV
    lost = [ln.split(",")[0] for ln in lines[1:4]]
    # crash after the CSV rows, before they were marked written: row 4
    kept = lines[4].split(",")[0]
    with db:
        db.executemany("UPDATE frames SET written = 0 WHERE rel = ?",
                       [(r,) for r in lost + [kept]])
    db.close()
    # and a line cut short at the end of the file
    env["all"].write_text("".join(lines[:1] + lines[4:]) + "dock/cut", encoding="utf-8")
    flagged = env["out"] / "flagged.csv"
    flagged.write_text(flagged.read_text(encoding="utf-8").splitlines(True)[0],
                       encoding="utf-8")  # its flagged row was lost too
    assert run_watch(env, None, 1.0) == 0
    rows = check_agree(env)
    assert len(rows) == 8
    con = sqlite3.connect(env["store"] / "inspector.sqlite")
    assert con.execute("SELECT COUNT(*) FROM frames WHERE written = 0").fetchone()[0] == 0
    con.close()


# --- as a process: signals ------------------------------------------------------------------

def start(env, *extra) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "inspector", *watch_args(env, *extra)],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True)


def wait_scored(env, n: int, proc: subprocess.Popen, limit: float = 120.0) -> None:
    """Wait until the ledger holds at least n scored rows (a generous limit, not a check)."""
    end = time.monotonic() + limit
    while time.monotonic() < end:
        db = env["store"] / "inspector.sqlite"
        if db.exists():
            con = sqlite3.connect(db, timeout=30)
            try:
                k = con.execute("SELECT COUNT(*) FROM frames WHERE status = 'scored'"
                                ).fetchone()[0]
            except sqlite3.OperationalError:
                k = 0
            con.close()
            if k >= n:
                return
        assert proc.poll() is None, proc.communicate()[0]
        time.sleep(0.05)
    raise AssertionError(f"fewer than {n} frames scored after {limit} s")


def test_restart_after_sigkill_scores_every_frame_exactly_once(env, capsys):
    anomalies = set(range(0, 400, 17))
    written = 0
    for target in (20, 90):  # kill twice, at different points of the stream
        proc = start(env)
        stop = threading.Event()

        def writer(first=written):
            i = first
            while not stop.is_set() and i < first + 200:
                for cam in ("dock", "aisle"):
                    write_frames(env["src"], cam, [i], anomalies=anomalies)
                i += 1
                time.sleep(0.01)
            writer.last = i

        t = threading.Thread(target=writer)
        t.start()
        wait_scored(env, target, proc)
        if target == 20:  # status sees the running watcher's lag
            capsys.readouterr()
            assert cli.main(["status", "--store", str(env["store"])]) == 0
            table = capsys.readouterr().out
            assert "not watched" not in table and "dock" in table, table
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        stop.set()
        t.join()
        written = writer.last
        for cam in ("dock", "aisle"):  # frames arriving while the tool is down
            write_frames(env["src"], cam, range(written, written + 5), anomalies=anomalies)
        written += 5
    proc = start(env, "--idle-exit", "2")
    out = proc.communicate(timeout=300)[0]
    assert proc.returncode == 0, out
    rows = check_agree(env)
    expect = {f"{cam}/{name(cam, i)}" for cam in ("dock", "aisle") for i in range(written)}
    assert set(rows) == expect
    assert {r["status"] for r in rows.values()} == {"scored"}
    assert env["all"].read_text(encoding="utf-8").count("frame,camera,time") == 1


def test_sigterm_finishes_the_frame_in_hand_and_exits_0(env, capsys):
    write_frames(env["src"], "dock", range(300))
    proc = start(env)
    wait_scored(env, 10, proc)
    second = cli.main(watch_args(env, "--idle-exit", "0"))  # one watcher per folder
    assert second == 2 and "already being watched" in capsys.readouterr().err
    proc.send_signal(signal.SIGTERM)
    out = proc.communicate(timeout=120)[0]
    assert proc.returncode == 0, out
    assert "scored" in out
    rows = check_agree(env)  # whatever was committed is in the CSV files, once
    assert 10 <= len(rows) <= 300
    # status: per camera, from the ledger
    st = subprocess.run([sys.executable, "-m", "inspector", "status", "--store",
                         str(env["store"])], cwd=ROOT, capture_output=True, text=True)
    assert st.returncode == 0
    dock = next(ln for ln in st.stdout.splitlines() if ln.startswith("dock"))
    assert dock.split()[1:3] == ["v1", str(len(rows))]
    proc = start(env, "--idle-exit", "1")
    assert proc.communicate(timeout=300)[0] and proc.returncode == 0
    rows = check_agree(env)
    assert len(rows) == 300


def test_watch_usage_errors(env, capsys):
    assert cli.main(watch_args(env, "--poll", "-1")) == 2
    bad = env["tmp"] / "bad.toml"
    bad.write_text("[watch]\nsettel = 1\n", encoding="utf-8")
    assert cli.main(["watch", str(env["src"]), "--config", str(bad)]) == 2
    assert cli.main(watch_args(env)[:1] + [str(env["tmp"] / "missing")]) == 2
    assert cli.main(["watch", str(env["src"]), "--out", str(env["src"] / "out")]) == 2
    err = capsys.readouterr().err
    assert "settel" in err and "not a folder" in err and "inside SOURCE" in err


def test_watch_and_events_sections_are_checked_when_the_config_is_loaded(tmp_path, capsys):
    """Any command reading the config refuses a bad [watch] or [events] section at once."""
    from inspector.config import load_config

    bad = tmp_path / "bad.toml"
    for text, word in (("[watch]\nworkers = 0\n", "workers"),
                       ("[events]\nk = 3\nn = 2\n", "k = 3"),
                       ("[watch]\nsettel = 1\n", "settel")):
        bad.write_text(text, encoding="utf-8")
        with pytest.raises(UsageError, match=word):
            load_config(bad)
        assert cli.main(["status", "--config", str(bad), "--store", str(tmp_path)]) == 2
    assert "workers" in capsys.readouterr().err


def test_a_busy_camera_flags_what_stays_across_a_restart(env, capsys):
    # Persistence on for dock (window 4): an object appears at frame 34 and stays. The first
    # run ends after two of its frames; the stream's window survives the restart in the
    # ledger, so the object's fourth frame (37) is flagged in the second run, with since =
    # its first frame. Frame 31 arrives only in the second run, after later frames: it is
    # scored, counted as late, and does not restart the stream. One worker keeps the order
    # in which batches are scored fixed.
    cfg = env["tmp"] / "busy.toml"
    cfg.write_text(env["cfg"].read_text(encoding="utf-8").replace("workers = 2", "workers = 1")
                   + '\n[cameras.dock]\npersistence = "on"\n', encoding="utf-8")
    env = {**env, "cfg": cfg}
    write_frames(env["src"], "dock", [30, 32, 33, 34, 35], anomalies={34, 35})
    assert run_watch(env, None, 1.0) == 0
    assert not csv_rows(env["out"] / "flagged.csv")
    capsys.readouterr()
    write_frames(env["src"], "dock", [31, 36, 37], anomalies={36, 37})
    assert run_watch(env, None, 1.0) == 0
    said = capsys.readouterr().out
    assert "1 frame of dock: frames that arrived after later ones" in said
    check_agree(env)
    assert [r["frame"] for r in csv_rows(env["out"] / "flagged.csv")] == [
        f"dock/{name('dock', 37)}"]
    ev = csv_rows(env["out"] / "events.csv")
    assert len(ev) == 1 and ev[0]["since"].endswith("00:00:34")


def test_a_busy_frame_drawn_on_the_spot_is_scored_as_in_the_stream(env):
    # The review page draws a missing overlay on the spot: for a camera with persistence it
    # is the frame scored with the frames before it (jobs.scan.in_stream). The reference is
    # the scan of the whole stream: the same score, persistence map and since.
    from inspector.config import load_config
    from inspector.jobs.scan import BaselineCache, in_stream, read_args
    from inspector.storage.frames import discover, read_frame
    from inspector.storage.store import Store

    cfg = env["tmp"] / "busy.toml"
    cfg.write_text(env["cfg"].read_text(encoding="utf-8")
                   + '\n[cameras.dock]\npersistence = "on"\n', encoding="utf-8")
    write_frames(env["src"], "dock", range(30, 40), anomalies=set(range(33, 40)))
    assert cli.main(["scan", str(env["src"]), "--store", str(env["store"]), "--config",
                     str(cfg), "--out", str(env["out"]), "--all-scores", str(env["all"])]) == 0
    scanned = {r["frame"]: r for r in csv_rows(env["all"])}
    flagged = {r["frame"]: r for r in csv_rows(env["out"] / "flagged.csv")}
    files = {f.rel: f for f in discover(env["src"])[0]}
    baseline = BaselineCache(Store(env["store"])).get("dock")
    for rel, read in ((f"dock/{name('dock', 37)}", True), (f"dock/{name('dock', 32)}", False)):
        # (the page hands over the frame it has read; without one, in_stream reads it)
        frame = read_frame(files[rel], **read_args(baseline, load_config(cfg))) if read else None
        got = in_stream(baseline, load_config(cfg), files[rel], env["src"] / "dock", frame)
        assert got.score == pytest.approx(float(scanned[rel]["score"]), abs=1e-3)
        assert got.flagged == (rel in flagged)
    assert got.since is None and rel not in flagged  # frame 32: nothing has stayed yet
    assert in_stream(baseline, load_config(env["cfg"]), files[rel], env["src"] / "dock") is None


def test_a_slow_baseline_load_holds_up_only_its_own_camera():
    # while one camera's baseline loads (16 cameras start at once), frames of cameras
    # already loaded are scored: the cache serialises loads per baseline, not globally
    # (common practice, no source)
    from inspector.jobs.scan import BaselineCache

    started, release = threading.Event(), threading.Event()

    class SlowStore:
        def load(self, camera, version=None):
            if camera == "slow":
                started.set()
                release.wait(60)
            return f"baseline of {camera}"

    cache = BaselineCache(SlowStore())
    assert cache.get("quick") == "baseline of quick"
    slow = threading.Thread(target=cache.get, args=("slow",))
    slow.start()
    assert started.wait(60)
    got: list[str] = []
    quick = threading.Thread(target=lambda: got.append(cache.get("quick")))
    quick.start()
    quick.join(60)
    answered_meanwhile = got == ["baseline of quick"] and not release.is_set()
    release.set()
    slow.join(60)
    assert answered_meanwhile
    assert cache.get("slow") == "baseline of slow"


def test_a_cameras_batches_are_scored_one_at_a_time_in_order(tmp_path):
    """Two workers: one camera's batches never run at once and go in the order its frames
    came, frames queued meanwhile join its next batch, and another camera's batch runs
    beside it. Scoring is replaced by a stand-in that waits for the test's signal; the
    test waits on events only, never on time (common practice, no source)."""
    import queue
    from types import SimpleNamespace

    from inspector.config import Config, WatchSettings
    from inspector.jobs.settle import Arrival
    from inspector.jobs.watch import Watcher
    from inspector.storage.frames import FrameFile
    from inspector.storage.ledger import Ledger

    started: queue.Queue = queue.Queue()
    release = {first: threading.Event() for first in ("a1", "b1", "a4")}
    running: Counter = Counter()
    seen_running: list[tuple[int, int]] = []  # at each start: (same camera, all cameras)
    guard = threading.Lock()

    def process(batch):
        cam = batch[0].camera
        names = [Path(it.path).name for it in batch]
        with guard:
            running[cam] += 1
            seen_running.append((running[cam], sum(running.values())))
        started.put((cam, names))
        release[names[0]].wait(60)
        with guard:
            running[cam] -= 1

    with Ledger(tmp_path / "ledger.sqlite") as ledger:
        w = Watcher(tmp_path, None, Config(), SimpleNamespace(ledger=ledger),
                    WatchSettings(workers=2), log=lambda text: None)
        w._process = process

        def arrive(cam: str, *names: str) -> None:
            for n in names:
                path = tmp_path / cam / n
                w.files.ready.append(Arrival(str(path), 1, 1.0, "", 0.0,
                                             FrameFile(path, f"{cam}/{n}", cam)))
            w._feed()

        arrive("a", "a1", "a2")
        workers = [threading.Thread(target=w._worker, daemon=True) for _ in range(2)]
        for t in workers:
            t.start()
        try:
            assert started.get(timeout=60) == ("a", ["a1", "a2"])
            arrive("a", "a4", "a3")  # queued while a's batch runs
            arrive("b", "b1")
            # b's batch starts while a's first batch is still in hand ...
            assert started.get(timeout=60) == ("b", ["b1"])
            with w._lock:  # ... and a's new frames wait for it
                assert [Path(it.path).name for it in w._work] == ["a4", "a3"]
            release["b1"].set()
            release["a1"].set()
            # both join a's next batch (the scorer puts them in capture-time order)
            assert started.get(timeout=60) == ("a", ["a4", "a3"])
            release["a4"].set()
        finally:
            for e in release.values():
                e.set()
            w.stop.set()
            for t in workers:
                t.join(timeout=60)
        assert [same for same, _ in seen_running] == [1, 1, 1]  # never two of a camera
        assert seen_running[1] == (1, 2)  # a and b at once
        assert not w._inflight and not w._scoring
