"""Baseline versions: the flag comparison, listing, switching, and learning from false alarms."""

from __future__ import annotations

import json

import numpy as np
import pytest
from _review_run import copy_run, make_run, write_ledger
from sklearn.metrics import confusion_matrix

from inspector.jobs.compare import compare_flags, compare_versions, last_scored
from inspector.storage.labels import Label, connect, put


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return make_run(tmp_path_factory.mktemp("baselines"))


def test_compare_flags_matches_confusion_matrix():
    rng = np.random.default_rng(0)
    old, new = rng.gamma(2.0, 2.0, 200), rng.gamma(2.0, 2.0, 200)
    c = compare_flags(old, 5.0, new, 6.0)
    # With the old flags as reference, scikit-learn's confusion matrix [[tn, fp], [fn, tp]]
    # counts the flags the new baseline adds (fp) and removes (fn).
    tn, fp, fn, tp = confusion_matrix(old > 5.0, new > 6.0, labels=[False, True]).ravel()
    assert (c.added, c.removed, c.frames) == (fp, fn, 200)
    assert (c.old_flags, c.new_flags) == (fn + tp, fp + tp)
    same = compare_flags(old, 5.0, old, 5.0)
    assert (same.added, same.removed) == (0, 0)
    with pytest.raises(ValueError):
        compare_flags(old, 5.0, new[:10], 5.0)


def test_last_scored_reads_the_ledger_newest_first(tmp_path):
    db = tmp_path / "inspector.sqlite"
    assert last_scored(db, "dock", 5) == []  # no file
    connect(db).close()  # a store with labels but no ledger table yet
    assert last_scored(db, "dock", 5) == []
    write_ledger(db, [(f"/f/dock/{k}.jpg", "dock", float(k)) for k in range(8)]
                 + [("/f/aisle/0.jpg", "aisle", 1.0)])
    assert last_scored(db, "dock", 3) == ["/f/dock/7.jpg", "/f/dock/6.jpg", "/f/dock/5.jpg"]


def test_false_alarms_fold_into_a_new_version_kept_inactive(run, tmp_path, capsys):
    r = copy_run(run, tmp_path)
    flagged = [row.split(",") for row in (r.out / "flagged.csv").read_text().splitlines()[1:]]
    camera = max(("dock", "aisle"), key=lambda c: sum(row[1] == c for row in flagged))
    dock = [row for row in flagged if row[1] == camera]
    other = "aisle" if camera == "dock" else "dock"
    conn = connect(r.store.database)
    labels = [Label(camera, str(r.source / row[0]), row[0], "", "false_alarm", "", None, None,
                    "v1", row[2], "now") for row in dock[:2]]
    labels.append(Label(camera, str(r.source / camera / "gone.jpg"), "gone.jpg", "",
                        "false_alarm", "", None, None, "v1", "", "now"))
    put(conn, labels)
    conn.close()
    frames = sorted((r.source / camera).iterdir())
    write_ledger(r.store.database, [(str(p), camera, 1.0) for p in frames])
    capsys.readouterr()
    normal = run.root / "frames" / "normal" / camera
    assert r.cli("learn", str(normal), "--camera", camera, "--add-false-alarms",
                 "--no-activate") == 0
    text = capsys.readouterr().out
    assert f"{camera}: adding 2 frames labelled 'false alarm'; 1 of them no longer exist" in text
    assert f"v2 instead of v1 on the last {len(frames)} scored frames" in text
    assert "v1 stays active" in text
    assert r.store.active_version(camera) == "v1"
    meta = r.store.metadata(camera, "v2")
    assert meta["false_alarm_frames"] == 2 and meta["frames"] == 24 + 2

    assert r.cli("baselines", camera) == 0
    listing = capsys.readouterr().out.splitlines()
    assert listing[1].split()[:2] == ["v1", "yes"] and listing[2].split()[0] == "v2"
    assert "masked" in listing[0] and listing[1].split()[-2].endswith("%")
    assert r.cli("baselines", camera, "--activate", "v2") == 0
    assert "is now active (was v1)" in capsys.readouterr().out
    assert json.loads((r.store.root / camera / "active.json").read_text())["version"] == "v2"
    assert r.cli("baselines", camera, "--activate", "v1", "--compare", "0") == 0  # rollback
    assert r.store.active_version(camera) == "v1"
    assert r.cli("baselines", camera, "--activate", "v9") == 2
    assert r.cli("baselines", "nosuchcamera") == 2
    assert r.cli("baselines", camera, "--activate", "../v1") == 2

    c = compare_versions(r.store, r.config, camera, "v1", "v2", n=5)
    assert c.change is not None and c.change.frames == 5
    c = compare_versions(r.store, r.config, other, "v1", "v2")  # no ledger rows for it
    assert c.change is None and "nothing to compare against" in c.text()


def test_comparison_without_ledger_says_so(run):
    c = compare_versions(run.store, run.config, "dock", "v1", "v1")
    assert c.change is None and "already" in c.text()
    c = compare_versions(run.store, run.config, "dock", None, "v1")
    assert "no active version" in c.text()
