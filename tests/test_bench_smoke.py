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
