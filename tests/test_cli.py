"""The command line end to end on generated frames: outputs, skips, exit codes."""

import csv
import re
import socket
import subprocess
import sys
from pathlib import Path

import cv2
import numpy as np
import pytest
from conftest import noisy_copies, write_frames
from skimage import data

from inspector.cli.main import main
from inspector.config import load_config
from inspector.jobs.scan import read_args
from inspector.storage.frames import discover, read_frame
from inspector.storage.results import COLUMNS, SKIP_COLUMNS
from inspector.storage.store import Store


def _scene(seed: int) -> np.ndarray:
    img = cv2.resize(data.chelsea(), (128, 96), interpolation=cv2.INTER_AREA)
    return np.roll(img, seed * 7, axis=1).astype(np.float32)


@pytest.fixture(scope="module")
def learnt(tmp_path_factory):
    """Two cameras learnt from 40 normal frames each, with a small config."""
    root = tmp_path_factory.mktemp("cli")
    cfg = root / "small.toml"
    cfg.write_text('[frames]\nlong_side = 64\n\n[calibration]\nfolds = 3\n', encoding="utf-8")
    rng = np.random.default_rng(0)
    for k, cam in enumerate(["gate", "yard"]):
        write_frames(root / "normal" / cam, noisy_copies(_scene(k), 40, rng), prefix=cam)
    code = main(["learn", str(root / "normal"), "--store", str(root / "store"),
                 "--config", str(cfg)])
    assert code == 0
    return root, cfg


def _snapshot(folder: Path) -> dict:
    return {p: (p.stat().st_size, p.stat().st_mtime_ns) for p in folder.rglob("*")}


def _new_frames(root: Path) -> Path:
    src = root / "new"
    if src.exists():
        return src
    rng = np.random.default_rng(1)
    imgs = noisy_copies(_scene(0), 6, rng)
    imgs[2, 30:60, 40:80] = (20, 200, 40)  # a green object in frame 2
    write_frames(src / "gate", imgs, prefix="gate")
    write_frames(src / "yard", noisy_copies(_scene(1), 3, rng), prefix="yard")
    write_frames(src / "attic", noisy_copies(_scene(0), 2, rng), prefix="attic")  # no baseline
    bad = src / "gate"
    (bad / "empty.jpg").write_bytes(b"")
    (bad / "notes.txt").write_text("shift log")
    buf = cv2.imencode(".jpg", _scene(0).astype(np.uint8))[1].tobytes()
    (bad / "cut.jpg").write_bytes(buf[: len(buf) // 2])
    (bad / "header.jpg").write_bytes(b"\xff\xd8\xff\xe0" + b"\x00" * 64)
    cv2.imwrite(str(bad / "square.png"), np.zeros((80, 80, 3), np.uint8))
    (bad / "upload.jpg.part").write_bytes(b"partial")
    cv2.imwrite(str(src / "loose.jpg"), _scene(0).astype(np.uint8))
    return src


def test_scan_writes_the_contract_and_never_touches_source(learnt, capsys):
    root, cfg = learnt
    src = _new_frames(root)
    before = _snapshot(src)
    out = root / "out"
    code = main(["scan", str(src), "--store", str(root / "store"), "--config", str(cfg),
                 "--out", str(out), "--all-scores", str(root / "all.csv"),
                 "--maps", str(root / "maps")])
    assert code == 0
    assert _snapshot(src) == before  # nothing written into SOURCE
    with open(out / "flagged.csv", newline="") as fh:
        reader = csv.reader(fh)
        assert tuple(next(reader)) == COLUMNS
        flagged = [dict(zip(COLUMNS, r)) for r in reader]
    with open(root / "all.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0]) == COLUMNS
    assert len(rows) == 9  # 6 gate + 3 yard frames scored
    by_frame = {r["frame"]: r for r in rows}
    hit = by_frame["gate/gate_20261120_080200.jpg"]
    assert float(hit["score"]) > float(hit["threshold"])  # the green object is flagged
    for r in flagged:
        assert float(r["score"]) > float(r["threshold"])
        assert Path(r["overlay"]).is_file() and r["baseline"] == "v1"
        assert 0 < float(r["p_value"]) <= 1
        assert r["time"].startswith("2026-11-20T08:")  # ISO 8601 capture time from the name
    for r in rows:
        if float(r["score"]) <= float(r["threshold"]):
            assert r["overlay"] == ""
    amap = np.load(root / "maps" / "gate" / "gate_20261120_080200.npy")
    assert amap.dtype == np.float32
    assert abs(amap.shape[1] / amap.shape[0] - 128 / 96) < 0.15  # the frame's aspect ratio
    with open(out / "skipped.csv", newline="") as fh:
        reader = csv.reader(fh)
        assert tuple(next(reader)) == SKIP_COLUMNS
        reasons = {r[0]: r[2] for r in reader}
    assert reasons["gate/empty.jpg"] == "empty file"
    assert reasons["gate/notes.txt"].startswith("not an image")
    assert reasons["gate/cut.jpg"].startswith("truncated JPEG")
    assert reasons["gate/header.jpg"].startswith("unreadable JPEG header")
    assert reasons["gate/square.png"].startswith("aspect ratio")
    assert reasons["attic/attic_20261120_080000.jpg"] == "no baseline for camera attic"
    assert reasons["loose.jpg"].startswith("not inside a camera folder")
    assert "gate/upload.jpg.part" not in reasons  # still being written: not a frame yet
    summary = capsys.readouterr().out
    assert "scored 9 frames" in summary and "skipped 8" in summary


def test_learn_one_camera_recursively_and_warn_about_a_small_calibration_set(learnt, capsys):
    root, cfg = learnt
    rng = np.random.default_rng(3)
    write_frames(root / "one" / "day1", noisy_copies(_scene(2), 12, rng), prefix="x")
    write_frames(root / "one" / "day2" / "late", noisy_copies(_scene(2), 12, rng), prefix="y")
    code = main(["learn", str(root / "one"), "--camera", "porch", "--store",
                 str(root / "store"), "--config", str(cfg)])
    assert code == 0
    out = capsys.readouterr().out
    assert "porch: baseline v1 (ppca) from 24 frames" in out
    # 3 time blocks: the last calibrates, scored by the model of the two before it.
    assert "warning: only 8 calibration frames" in out and "more normal frames" in out
    assert "masked: 0.0% of the view (automatic text mask 0.0%, configured 0.0%)" in out


@pytest.mark.parametrize("args,message", [
    (["scan", "does-not-exist"], "is not a folder"),
    (["learn", "{root}/normal", "--config", "{root}/nope.toml"], "config file not found"),
    (["learn", "{root}/normal", "--config", "{root}/badkey.toml"], "unknown key [frames] 'size'"),
    (["learn", "{root}/normal", "--config", "{root}/badval.toml"], "alpha = 2.0 is outside"),
    (["scan", "{root}/normal", "--out", "{root}/normal/out"], "inside SOURCE"),
    (["learn", "{root}/few", "--camera", "c"], "at least 10 are needed"),
    (["scan", "{root}/normal", "--bogus"], "unrecognized arguments: --bogus"),
    # a new user's slips: a misspelt section, a file where a folder goes and the reverse
    (["learn", "{root}/normal", "--config", "{root}/badsection.toml"],
     "unknown section [calibraton] (sections: [paths], [frames]"),
    (["scan", "{root}/normal", "--out", "{root}/small.toml"], "is a file; a folder is expected"),
    (["scan", "{root}/normal", "--out", "{root}/o", "--maps", "{root}/small.toml"],
     "is a file; a folder is expected"),
    (["scan", "{root}/normal", "--out", "{root}/o", "--all-scores", "{root}/few"],
     "is a folder; a file is expected"),
    (["learn", "{root}/normal", "--store", "{root}/small.toml"], "is not a folder"),
    (["scan", "{root}/normal", "--store", "{root}/small.toml"], "is not a folder"),
    (["demo", "--out", "{root}/small.toml"], "the demo needs a folder"),
    (["demo", "--out", "{root}/d", "--seed", "-1"], "--seed must be 0 or more"),
    (["status", "--out", "{root}/nowhere"], "--out '{root}/nowhere' is not a folder"),
    # a camera table whose name no camera folder can have (one folder level under SOURCE,
    # not hidden, not a download still being written: storage/frames.py)
    (["learn", "{root}/normal", "--config", "{root}/cam0.toml"],
     '[cameras."../x"] cannot be a camera (a camera name is a folder name'),
    (["learn", "{root}/normal", "--config", "{root}/cam1.toml"],
     '[cameras.""] cannot be a camera'),
    (["learn", "{root}/normal", "--config", "{root}/cam2.toml"],
     '[cameras."dock/east"] cannot be a camera'),
    (["learn", "{root}/normal", "--config", "{root}/cam3.toml"],
     '[cameras.".dock"] cannot be a camera'),
    (["learn", "{root}/normal", "--camera", "dock.part"], "invalid camera name 'dock.part'"),
])
def test_usage_errors_exit_2_with_one_line(learnt, capsys, args, message):
    root, _ = learnt
    (root / "badkey.toml").write_text("[frames]\nsize = 3\n")
    (root / "badval.toml").write_text("[calibration]\nalpha = 2.0\n")
    (root / "badsection.toml").write_text("[calibraton]\nalpha = 0.02\n")
    for k, name in enumerate(["../x", "", "dock/east", ".dock"]):
        (root / f"cam{k}.toml").write_text(f'[cameras."{name}"]\nalpha = 0.02\n')
    write_frames(root / "few", noisy_copies(_scene(0), 3, np.random.default_rng(0)))
    argv = [a.format(root=root) for a in args]
    if args[0] != "demo" and "--store" not in args:
        argv += ["--store", str(root / "store-x")]
    assert main(argv) == 2
    said = capsys.readouterr()
    err = said.err.strip()
    message = message.format(root=root)
    assert message in err and len(err.splitlines()) == 1 and "Traceback" not in err
    assert "generating" not in said.out  # refused before any work


def test_scan_says_what_a_new_user_got_wrong(learnt, capsys):
    """One camera's folder given as SOURCE, a store without the baselines, an empty folder:
    each run ends with one line saying so and what to do (the frames are in skipped.csv)."""
    root, cfg = learnt
    (root / "nothing").mkdir(exist_ok=True)
    said = {}
    for name, source, store in (("loose", "normal/gate", "store"),
                                ("unlearnt", "normal", "store-empty"),
                                ("empty", "nothing", "store")):
        assert main(["scan", str(root / source), "--store", str(root / store), "--config",
                     str(cfg), "--out", str(root / f"out-{name}")]) == 0
        said[name] = capsys.readouterr().out
    assert "outside any camera folder: 40 files directly in SOURCE" in said["loose"]
    assert "no baseline for gate, yard (80 frames not scored" in said["unlearnt"]
    assert "no frames found under" in said["empty"]
    assert "no baseline" not in said["loose"] + said["empty"]


def test_learn_checks_every_camera_before_learning_any(learnt, capsys):
    root, _ = learnt
    cfg = root / "badmask.toml"
    cfg.write_text('[frames]\nlong_side = 64\n[cameras.yard]\nmask_image = "nothere.png"\n',
                   encoding="utf-8")
    store = root / "store-badmask"
    assert main(["learn", str(root / "normal"), "--store", str(store), "--config",
                 str(cfg)]) == 2
    err = capsys.readouterr().err.strip()
    assert "[cameras.yard] mask_image 'nothere.png' is not a readable image" in err
    assert not (store / "gate").exists()  # gate, listed first, was not learnt meanwhile


def test_review_on_an_address_it_cannot_listen_on_exits_2_with_one_line(learnt, capsys):
    root, cfg = learnt
    assert main(["scan", str(root / "normal"), "--store", str(root / "store"), "--config",
                 str(cfg), "--out", str(root / "res")]) == 0
    capsys.readouterr()
    with socket.socket() as busy:  # the port is taken by another program
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        code = main(["review", "--out", str(root / "res"), "--store", str(root / "store"),
                     "--config", str(cfg), "--port", str(busy.getsockname()[1])])
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.startswith("inspector: error: cannot listen on 127.0.0.1:"), err
    assert len(err.splitlines()) == 1


def test_module_entry_point_reports_usage_errors_without_traceback(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "inspector", "scan", str(tmp_path / "none")],
                          capture_output=True, text=True, cwd=tmp_path, stdin=subprocess.DEVNULL)
    assert proc.returncode == 2
    assert proc.stderr.strip().startswith("inspector: error:") and "Traceback" not in proc.stderr


def test_everything_but_the_vae_runs_without_torch(learnt, tmp_path):
    # torch is optional: with it blocked, learn/scan with PPCA work and --model vae says
    # what to install (exit 2, one line).
    root, cfg = learnt
    code = (
        "import sys; sys.modules['torch'] = None\n"
        "from inspector.cli.main import main\n"
        f"a = main(['scan', {str(root / 'normal')!r}, '--store', {str(root / 'store')!r},"
        f" '--config', {str(cfg)!r}, '--out', {str(tmp_path / 'out')!r}])\n"
        f"b = main(['learn', {str(root / 'normal')!r}, '--model', 'vae', '--store',"
        f" {str(tmp_path / 'st')!r}, '--config', {str(cfg)!r}])\n"
        "print('codes', a, b)\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          stdin=subprocess.DEVNULL, cwd=tmp_path)
    assert "codes 0 2" in proc.stdout, proc.stderr
    assert "needs PyTorch" in proc.stderr and "Traceback" not in proc.stderr


def _parsers(parser, path=("inspector",)):
    """(command words, parser) of the parser and every command and subcommand under it."""
    import argparse

    yield path, parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            helped = {a.dest for a in action._choices_actions if a.help}
            for name, sub in action.choices.items():
                assert name in helped, f"{' '.join(path)} {name} has no help line"
                yield from _parsers(sub, (*path, name))


def test_help_of_every_command_lists_every_argument_with_help(capsys):
    """Every option and positional argument of every command says what it is for, and the
    commands are listed in the order of the work (common practice, no source)."""
    import argparse

    from inspector.cli.main import build_parser

    seen = 0
    for path, parser in _parsers(build_parser()):
        for action in parser._actions:
            if action.help == argparse.SUPPRESS or isinstance(action, argparse._HelpAction):
                continue
            name = "/".join(action.option_strings) or action.metavar or action.dest
            assert action.help and action.help.strip(), f"{' '.join(path)}: {name} has no help"
            seen += 1
        with pytest.raises(SystemExit) as stop:
            main([*path[1:], "--help"])
        assert stop.value.code == 0
        text = capsys.readouterr().out
        assert text.startswith("usage: " + " ".join(path))
    assert seen > 30
    top = build_parser().format_help()
    order = ["learn", "scan", "watch", "review", "labels", "baselines", "status", "demo"]
    where = [top.index(f"\n    {name}") for name in order]
    assert where == sorted(where)
    for positional in ("CAMERA", "FILE.csv", "SOURCE"):  # named in the issue: each has help
        assert positional in " ".join(p.format_help() for _, p in _parsers(build_parser()))


def test_scan_counts_and_records_frames_judged_with_amplified_noise(learnt, capsys):
    # A frame exposed at half the light needs twice the gain of the same frame as captured
    # (reference ~ gain * frame: halve the frame, double the gain), above every normal
    # frame's: its noise is taken as amplified by its gain over the largest normal one.
    root, cfg = learnt
    src = root / "dark"
    frames = noisy_copies(_scene(0), 2, np.random.default_rng(5))
    frames[1] = (frames[0].astype(np.float32) * 0.5).round().astype(np.uint8)
    paths = write_frames(src / "gate", frames, prefix="gate")
    main(["scan", str(src), "--store", str(root / "store"), "--config", str(cfg),
          "--out", str(root / "dark-out"), "--all-scores", str(root / "dark.csv")])
    printed = capsys.readouterr().out
    baseline = Store(root / "store").load("gate")
    top = baseline.conditions.gain_max_
    with open(root / "dark.csv", newline="") as fh:
        rows = {r["frame"]: r for r in csv.DictReader(fh)}
    assert rows[f"gate/{paths[0].name}"]["noise_amplified"] == ""
    ratio = float(rows[f"gate/{paths[1].name}"]["noise_amplified"])
    said = re.search(r"warning: 1 frame of gate: darker than every normal frame \(brought back "
                     rf"with a gain above {top:.2f}, at most ([0-9.]+)x that, 1 of them at "
                     r"1\.5x or more\), judged with their noise amplified", printed)
    assert said and float(said.group(1)) == pytest.approx(ratio, abs=0.001)  # the column's
    # the bright frame's gain as read back (JPEG), doubled: the dark frame's, by the formula
    files = {f.rel: f for f in discover(src)[0]}
    bright = read_frame(files[f"gate/{paths[0].name}"],
                        **read_args(baseline, load_config(cfg))).image
    g = baseline.conditions.prepare(bright[None]).gains[0, 0]
    assert float(rows[f"gate/{paths[1].name}"]["noise_amplified"]) == pytest.approx(
        2 * g / top, rel=0.03)
