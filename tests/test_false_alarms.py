"""End to end: the false-alarm rate promised at learn time holds on the frames that follow.

The whole path as ``learn`` and ``scan`` run it (the final model, the per-cell
standardisation, the threshold), on a camera looking at a photograph bundled with
scikit-image (bench/calibration.py), stationary or with a slow change of light that goes on
after the normal frames; every scanned frame comes after every normal frame. The realised
rate over several seeds must lie within a binomial interval (scipy.stats.binom) of alpha:
never above it (the promise), and not vacuously below it either (a threshold set far too
high would keep the promise and miss incidents).

Both models calibrate by forward chaining (each time block scored by the model of the
frames before it; the final model scans), PPCA with exact refits, the VAE as one training
run over a growing window (inspector/core/models/vae.py).
"""

import importlib.util
import subprocess
import sys
from pathlib import Path

import pytest
from scipy.stats import binom

ROOT = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("calibration_bench",
                                               ROOT / "bench" / "calibration.py")
bench = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(bench)

ALPHAS = (0.01, 0.05)
#: (normal frames, seeds) per model: enough calibration frames for alpha = 0.01 (both
#: calibrate on the newest 60%), as few runs as keep the test fast.
RUNS = {"ppca": (600, 10), "vae": (600, 4)}


@pytest.mark.parametrize("model,drift", [("ppca", 0.0), ("ppca", bench.DRIFT), ("vae", 0.0),
                                         ("vae", bench.DRIFT)],
                         ids=["ppca-stationary", "ppca-drifting", "vae-stationary",
                              "vae-drifting"])
def test_realised_false_alarm_rate_is_alpha_on_later_frames(model, drift):
    n, seeds = RUNS[model]
    totals = {a: [0, 0] for a in ALPHAS}
    for seed in range(seeds):
        for a, (k, m) in bench.run(model, "after", n, n // bench.FOLDS, ALPHAS, drift,
                                   seed).items():
            totals[a][0] += k
            totals[a][1] += m
    for a, (k, m) in totals.items():
        hi = binom.interval(0.999, m, a)[1]
        assert k <= hi, (model, drift, a, k / m)                   # the promise
        assert k >= binom.interval(0.999, m, a / 3)[0], (model, drift, a, k / m)


def test_calibration_bench_smoke():
    proc = subprocess.run([sys.executable, str(ROOT / "bench" / "calibration.py"),
                           "--models", "ppca", "--n", "40", "--seeds", "1", "--alpha", "0.1",
                           "--drift", "1", "--tail-trials", "2"], capture_output=True, text=True, timeout=300,
                          check=False)
    assert proc.returncode == 0, proc.stderr
    assert "before" in proc.stdout and "after" in proc.stdout
    assert "90% bound" in proc.stdout


def test_learn_speed_bench_smoke(tmp_path):
    proc = subprocess.run([sys.executable, str(ROOT / "bench" / "learn_speed.py"), "--frames",
                           "12", "--size", "320x180", "--keep", str(tmp_path)],
                          capture_output=True, text=True, timeout=300, check=False)
    assert proc.returncode == 0, proc.stderr
    assert "ratio" in proc.stdout and "learn peak MB" in proc.stdout
