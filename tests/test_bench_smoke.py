"""A tiny run of each benchmark script, so that the scripts keep working as the code
moves (the full runs are manual; no timing is checked here)."""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parents[1] / "bench"


def _script(name: str):
    spec = importlib.util.spec_from_file_location(f"bench_{name}", BENCH / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_throughput_bench_runs(tmp_path, capsys):
    rc = _script("throughput").main(["--frames", "6", "--normal", "12", "--rounds", "1",
                                     "--size", "640x360", "--long-side", "96",
                                     "--keep", str(tmp_path), "--stages"])
    out = capsys.readouterr().out
    assert rc == 0 and "ratio scan/decode" in out and "per CPU second" in out
    assert "registration (phase correlation)" in out and "baseline loading" in out


def test_kept_frames_are_reused_only_when_they_are_what_was_asked(tmp_path):
    sys.path.insert(0, str(BENCH))
    from _frames import depot_frames

    first, _ = depot_frames(tmp_path, 4, 3, (64, 36))
    one = sorted(first.new.rglob("*.jpg"))
    stamp = one[0].stat().st_mtime_ns
    again, _ = depot_frames(tmp_path, 4, 3, (64, 36))  # the same: reused, not drawn again
    assert sorted(again.new.rglob("*.jpg")) == one and one[0].stat().st_mtime_ns == stamp
    more, _ = depot_frames(tmp_path, 8, 3, (64, 36))  # more frames asked: drawn again
    assert len(list(more.new.rglob("*.jpg"))) == 8
    from inspector.storage.frames import image_size

    larger, _ = depot_frames(tmp_path, 8, 3, (96, 54))  # larger frames asked: drawn again
    assert image_size(sorted(larger.new.rglob("*.jpg"))[0]) == (96, 54)


def test_conditions_bench_runs(capsys):
    rc = _script("conditions").main(["--normal", "24", "--new", "8", "--cases", "none",
                                     "--handling", "local (default)", "--long-side", "96"])
    out = capsys.readouterr().out
    assert rc == 0 and "| none | local (default) |" in out


def test_models_bench_runs(capsys):
    rc = _script("models").main(["--normal", "24", "--new", "8", "--models", "ppca",
                                 "--cameras", "dock", "--long-side", "96"])
    out = capsys.readouterr().out
    assert rc == 0 and "image AUROC" in out and "dock   ppca" in out


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc for memory")
def test_watch_latency_bench_runs(capsys):
    rc = _script("watch_latency").main(["--rate", "4", "--seconds", "3", "--cameras", "3",
                                        "--long-side", "96"])
    out = capsys.readouterr().out
    assert rc == 0 and "p95 / target" in out and "peak resident memory" in out
