"""Benchmark: the PPCA and VAE models side by side on the demo scenario, in one run.

For each camera of the synthetic depot (:func:`inspector.demo.scenario.generate`) and each
model, a baseline is learnt through the real pipeline (:func:`inspector.jobs.learn.learn_camera`:
decoding, fitting, held-out maps, calibration, store) and the frames to scan are scored
through the stored baseline (:meth:`inspector.core.baseline.Baseline.score`: raw maps,
standardisation, frame score). Reported per camera and model:

* image AUROC: frame scores against the scenario's incident labels;
* pixel AUROC: the standardised anomaly maps, resized to the working resolution, against
  the incident masks (frames without an incident count as all-normal pixels);
* training seconds: the whole ``learn_camera`` call, frame decoding included;
* scoring frames/s: ``Baseline.score`` on already-decoded frames in batches of 16 (the
  model's share of a scan with the frames' preparation, as scan does it; JPEG decoding is
  the same for both models and left out), by the wall clock and per CPU second of this
  process (less sensitive to other work on a shared machine; one thread's worth).

Both models run with their default settings, as ``inspector learn`` builds them (the VAE
on one torch thread). The load average is printed with the table: on a shared machine
the times are only comparable within one run.

Usage::

    .venv/bin/python bench/models.py [--normal 240] [--new 120] [--seed 0]
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import tempfile
import time
from pathlib import Path

import cv2
import numpy as np
from sklearn.metrics import roc_auc_score

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from inspector.config import Config  # noqa: E402
from inspector.demo.scenario import generate, load_truth  # noqa: E402
from inspector.jobs.learn import learn_camera  # noqa: E402
from inspector.storage.frames import discover, iter_batches, read_settings  # noqa: E402
from inspector.storage.store import Store  # noqa: E402

BATCH = 16
#: The scenario's timestamp box (top-left) in exported 960x540 pixels, with a margin.
STAMP = [[0, 0], [270, 0], [270, 40], [0, 40]]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=None,
                    help="folder for the scenario and stores (default: a temporary folder)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--normal", type=int, default=240, help="normal frames per camera")
    ap.add_argument("--new", type=int, default=120, help="frames to scan per camera")
    ap.add_argument("--models", default="ppca,vae")
    ap.add_argument("--cameras", default="dock,aisle")
    ap.add_argument("--long-side", type=int, default=0,
                    help="working long side (default: the tool's default)")
    ap.add_argument("--no-stamp-mask", action="store_true",
                    help="do not mask the burned-in timestamp (its digits on the scan day "
                         "never occur in the normal frames, so every model flags them)")
    args = ap.parse_args(argv)
    if args.out is None:
        with tempfile.TemporaryDirectory(prefix="inspector-bench-") as tmp:
            return run(Path(tmp), args)
    return run(args.out, args)


def run(root: Path, args: argparse.Namespace) -> int:
    t0 = time.perf_counter()
    scenario = generate(root / "scenario", seed=args.seed, normal_per_camera=args.normal,
                        new_per_camera=args.new)
    print(f"scenario: {args.normal} normal + {args.new} new frames per camera "
          f"({time.perf_counter() - t0:.1f} s to render)", file=sys.stderr)
    config = Config()
    if args.long_side:
        config = dataclasses.replace(config, frames=dataclasses.replace(
            config.frames, long_side=args.long_side))
    if not args.no_stamp_mask:
        config = dataclasses.replace(config, cameras={
            cam: {"mask_polygons": [STAMP]} for cam in args.cameras.split(",")})
    normal, _ = discover(scenario.normal)
    new, _ = discover(scenario.new)
    truth = {(frame, cam): kind for frame, cam, kind in load_truth(scenario)}
    rows = []
    for camera in args.cameras.split(","):
        cam_normal = [f for f in normal if f.camera == camera]
        cam_new = [f for f in new if f.camera == camera]
        base = config.camera(camera)
        images, labels, masks = None, None, None
        for name in args.models.split(","):
            cfg = dataclasses.replace(base, model=dataclasses.replace(base.model, model=name))
            store = Store(root / f"store-{name}")
            report = learn_camera(cam_normal, cfg, store)
            baseline = store.load(camera)
            if images is None:
                images, labels, masks = _scan_set(cam_new, baseline, cfg, truth, scenario)
            baseline.model.score_maps(images[:2])  # warm-up (first-call allocations)
            started, cpu = time.perf_counter(), time.process_time()
            maps, scores = [], []
            for i in range(0, len(images), BATCH):
                s = baseline.score(images[i:i + BATCH])
                maps.append(s.maps)
                scores.append(s.scores)
            seconds = time.perf_counter() - started
            cpu = time.process_time() - cpu
            maps, scores = np.concatenate(maps), np.concatenate(scores)
            h, w = images.shape[1:3]
            up = np.stack([cv2.resize(m, (w, h), interpolation=cv2.INTER_LINEAR) for m in maps])
            learned = baseline.meta.get("model_learned", {})
            rows.append({
                "camera": camera, "model": name,
                "image_auroc": roc_auc_score(labels, scores),
                "pixel_auroc": roc_auc_score(masks.ravel(), up.ravel()),
                "train_s": report.seconds, "frames": report.frames,
                "score_fps": len(images) / seconds, "score_cpu_fps": len(images) / cpu,
                "calibration": int(baseline.meta.get("calibration_frames", 0)),
                "flagged": int((scores > baseline.threshold.value)[labels == 0].sum()),
                "caught": int((scores > baseline.threshold.value)[labels == 1].sum()),
                "normal": int((labels == 0).sum()), "incidents": int(labels.sum()),
                "note": _note(name, learned),
            })
            print(f"  {camera} {name}: done in {report.seconds:.1f} s", file=sys.stderr)
    _table(rows, args)
    return 0


def _scan_set(files, baseline, cfg, truth, scenario):
    """Decoded frames to scan, their labels and incident masks at working resolution."""
    images, labels, masks = [], [], []
    w, h = baseline.size
    frames = [frame for batch in iter_batches(
        files, BATCH, **read_settings(cfg.frames), size=baseline.size,
        source_size=baseline.source_size)
        for frame in batch.frames]
    for frame in frames:
        f = frame.file
        kind = truth[(f.rel, f.camera)]
        images.append(frame.image)
        labels.append(int(kind != "none"))
        m = np.zeros((h, w), bool)
        if kind != "none":
            png = cv2.imread(str(scenario.masks / f.camera / (Path(f.rel).stem + ".png")),
                             cv2.IMREAD_GRAYSCALE)
            if png is not None:
                m = cv2.resize(png, (w, h), interpolation=cv2.INTER_AREA) >= 128
        masks.append(m)
    return np.stack(images), np.array(labels), np.stack(masks)


def _note(name: str, learned: dict) -> str:
    if name == "vae":
        return (f"epochs {learned.get('epochs')} (best {learned.get('best_epoch')}), "
                f"held-out ELBO {learned.get('best_heldout_elbo_per_dim', float('nan')):.3f}"
                f" nats/dim, {learned.get('parameters')} weights; chain steps (best epoch) "
                + ", ".join(f"{c['steps']} ({c['best_epoch']})"
                            for c in learned.get("chain", []) + [learned]))
    return f"latent {learned.get('latent')}"


def _table(rows: list[dict], args: argparse.Namespace) -> None:
    import os

    print(f"\nPPCA vs VAE on the demo scenario (seed {args.seed}, {args.normal} normal and "
          f"{args.new} new frames per camera, working size "
          f"{args.long_side or Config().frames.long_side} long side, timestamp "
          f"{'not ' if args.no_stamp_mask else ''}masked; load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs)\n")
    head = (f"{'camera':<7}{'model':<6}{'image AUROC':>12}{'pixel AUROC':>12}{'train s':>9}"
            f"{'frames':>7}{'score f/s':>10}{'per CPU s':>10}{'cal':>5}{'caught':>9}{'false':>8}  notes")
    print(head)
    print("-" * len(head))
    for r in rows:
        print(f"{r['camera']:<7}{r['model']:<6}{r['image_auroc']:>12.3f}{r['pixel_auroc']:>12.3f}"
              f"{r['train_s']:>9.1f}{r['frames']:>7}{r['score_fps']:>10.1f}"
              f"{r['score_cpu_fps']:>10.1f}"
              f"{r['calibration']:>5}{r['caught']:>5}/{r['incidents']:<3}"
              f"{r['flagged']:>4}/{r['normal']:<3}  {r['note']}")


if __name__ == "__main__":
    sys.exit(main())
