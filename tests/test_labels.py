"""Review labels: the table, its summary and the labels commands."""

from __future__ import annotations

import csv
import math
import sqlite3

import pytest
from sklearn.metrics import precision_score

from inspector.cli.main import main
from inspector.storage.labels import (
    EXPORT_COLUMNS,
    Label,
    connect,
    put,
    read,
    remove,
    summarize,
)


def lab(camera, name, label, when="2026-11-30T22:00:00", note=""):
    return Label(camera=camera, path=f"/frames/{camera}/{name}", rel=f"{camera}/{name}",
                 event="", label=label, note=note, score=12.5, threshold=5.0, version="v1",
                 capture_time=when, labelled_at="2026-12-01T08:00:00+00:00")


def test_put_read_replace_remove_and_wal(tmp_path):
    db = tmp_path / "store" / "inspector.sqlite"
    conn = connect(db)
    # WAL lets the watcher write its ledger while review writes labels (SQLite docs, "WAL").
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    put(conn, [lab("dock", "a.jpg", "incident"), lab("aisle", "b.jpg", "unsure")])
    put(conn, [lab("dock", "a.jpg", "false_alarm", note="forklift shadow")])
    rows = read(conn)
    assert [(r.camera, r.label, r.note) for r in rows] == [
        ("aisle", "unsure", ""), ("dock", "false_alarm", "forklift shadow")]
    assert [r.camera for r in read(conn, label="false_alarm")] == ["dock"]
    assert remove(conn, "dock", ["/frames/dock/a.jpg"]) == 1
    assert [r.camera for r in read(conn)] == ["aisle"]
    with pytest.raises(ValueError):
        put(conn, [lab("dock", "a.jpg", "maybe")])
    with pytest.raises(sqlite3.IntegrityError):  # the table itself refuses unknown labels too
        with conn:
            conn.execute("INSERT INTO labels (camera, path, label, labelled_at) "
                         "VALUES ('dock', '/x', 'maybe', 'now')")
    conn.close()


def test_ledger_table_of_the_watcher_is_left_alone(tmp_path):
    db = tmp_path / "inspector.sqlite"
    other = sqlite3.connect(db)
    other.execute("CREATE TABLE frames (path TEXT, camera TEXT, status TEXT)")
    other.execute("INSERT INTO frames VALUES ('/f/1.jpg', 'dock', 'scored')")
    other.commit()
    other.close()
    conn = connect(db)
    put(conn, [lab("dock", "a.jpg", "incident")])
    assert conn.execute("SELECT COUNT(*) FROM frames").fetchone()[0] == 1
    conn.close()


def test_summary_counts_rate_and_precision():
    labels = [lab("dock", f"{k}.jpg", kind, when)
              for k, (kind, when) in enumerate([
                  ("incident", "2026-11-28T23:10:00"), ("false_alarm", "2026-11-28T23:50:00"),
                  ("false_alarm", "2026-11-29T02:00:00"), ("incident", "2026-11-30T01:00:00"),
                  ("incident", "2026-11-30T04:00:00"), ("unsure", "2026-11-30T05:00:00")])]
    labels.append(lab("aisle", "x.jpg", "unsure"))
    dock, aisle = {s.camera: s for s in summarize(labels)}["dock"], summarize(labels)[0]
    assert (dock.reviewed, dock.incidents, dock.false_alarms, dock.unsure) == (6, 3, 2, 1)
    assert dock.days == 3  # 28, 29 and 30 November, first and last day included
    assert dock.false_alarms_per_day == pytest.approx(2 / 3)
    # Precision of the flags = TP / (TP + FP) with every labelled flag predicted positive and
    # "unsure" left out; checked against scikit-learn's precision_score.
    decided = [x for x in labels if x.camera == "dock" and x.label != "unsure"]
    y_true = [x.label == "incident" for x in decided]
    assert dock.precision == pytest.approx(precision_score(y_true, [True] * len(y_true)))
    assert aisle.camera == "aisle" and math.isnan(aisle.precision)


def test_labels_commands(tmp_path, capsys):
    store = tmp_path / "store"
    conn = connect(store / "inspector.sqlite")
    put(conn, [lab("dock", "a.jpg", "incident", note="parcel, left by the door"),
               lab("dock", "b.jpg", "false_alarm"), lab("aisle", "c.jpg", "false_alarm")])
    conn.close()
    out = tmp_path / "labels.csv"
    assert main(["labels", "export", str(out), "--store", str(store)]) == 0
    with open(out, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0].keys()) == EXPORT_COLUMNS
    # named as in flagged.csv (common practice in this project: one name per thing)
    assert {"frame", "time", "baseline"} <= set(rows[0]) and "rel" not in rows[0]
    assert rows[1]["frame"] == "dock/a.jpg"
    assert [(r["camera"], r["label"]) for r in rows] == [
        ("aisle", "false_alarm"), ("dock", "incident"), ("dock", "false_alarm")]
    assert rows[1]["note"] == "parcel, left by the door"
    capsys.readouterr()
    assert main(["labels", "summary", "--store", str(store)]) == 0
    text = capsys.readouterr().out
    assert "precision" in text and "dock" in text and "0.50" in text
    # A store without labels: a plain message, not an error.
    assert main(["labels", "summary", "--store", str(tmp_path / "empty")]) == 0
    assert "no labels yet" in capsys.readouterr().out
    assert main(["labels", "export", str(tmp_path / "nowhere" / "x.csv"),
                 "--store", str(store)]) == 2


def test_labels_export_dash_writes_standard_output(tmp_path, capsys, monkeypatch):
    # "-" as a file name means standard output (common practice, no source); the count goes
    # to standard error so that standard output is the CSV alone.
    store = tmp_path / "store"
    conn = connect(store / "inspector.sqlite")
    put(conn, [lab("dock", "a.jpg", "incident"), lab("aisle", "c.jpg", "false_alarm")])
    conn.close()
    monkeypatch.chdir(tmp_path)
    capsys.readouterr()
    assert main(["labels", "export", "-", "--store", str(store)]) == 0
    assert not (tmp_path / "-").exists()
    captured = capsys.readouterr()
    rows = list(csv.DictReader(captured.out.splitlines()))
    assert tuple(rows[0].keys()) == EXPORT_COLUMNS
    assert [(r["camera"], r["label"]) for r in rows] == [
        ("aisle", "false_alarm"), ("dock", "incident")]
    assert "wrote 2 labels" in captured.err
