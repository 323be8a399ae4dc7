"""The review server at the HTTP level: pages, pictures, labels, and its safety rules."""

from __future__ import annotations

import http.client
import json

import cv2
import numpy as np
import pytest
from _review_run import copy_run, make_run, serving, write_ledger

from inspector.jobs.scan import read_args
from inspector.review.server import LOOPBACK_NAMES, create_app
from inspector.storage.frames import FrameFile, read_frame
from inspector.storage.labels import connect, read

TOKEN = "test-token-123"


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return make_run(tmp_path_factory.mktemp("review_http"))


@pytest.fixture()
def mine(run, tmp_path):
    return copy_run(run, tmp_path)


@pytest.fixture()
def client(mine):
    app = create_app(mine.out, mine.store, mine.config, token=TOKEN,
                     allowed_hosts=LOOPBACK_NAMES)
    return app.test_client()


def post_label(client, body, token=TOKEN, raw=None):
    headers = {"X-Review-Token": token} if token else {}
    data = raw if raw is not None else json.dumps(body)
    return client.post("/api/label", data=data, headers=headers,
                       content_type="application/json")


def flagged_rows(run):
    lines = (run.out / "flagged.csv").read_text(encoding="utf-8").splitlines()[1:]
    return [line.split(",") for line in lines]


def test_page_lists_filters_and_shows_an_item(client, run):
    rows = flagged_rows(run)
    page = client.get("/")
    assert page.status_code == 200
    html = page.get_data(as_text=True)
    assert html.count('class="row') == len(rows)
    assert TOKEN in html  # the token is embedded for the page's own script
    assert "<svg" in html and 'class="threshold"' in html
    camera = rows[0][1]
    html = client.get(f"/?camera={camera}").get_data(as_text=True)
    assert html.count('class="row') == sum(r[1] == camera for r in rows)
    assert client.get("/?camera=nosuch").get_data(as_text=True).count('class="row') == 0
    html = client.get("/?sort=newest&label=unlabelled&since=2026-01-01&until=2030-01-01")
    assert html.status_code == 200
    for bad in ("since=yesterday", "until=2026-13-01", "sort=random", "label=maybe",
                "view=x"):
        resp = client.get(f"/?{bad}")
        assert resp.status_code == 400 and b"Traceback" not in resp.data
    assert client.get("/?item=f9999").status_code == 404


def test_pictures_and_expected_image(client, run):
    rows = flagged_rows(run)
    frame = client.get("/img/f1/frame")
    assert frame.status_code == 200 and frame.mimetype == "image/jpeg"
    assert frame.data == (run.source / rows[0][0]).read_bytes()
    assert client.get("/img/f1/overlay").mimetype == "image/jpeg"
    png = client.get("/img/f1/expected")
    assert png.status_code == 200 and png.mimetype == "image/png"
    got = cv2.cvtColor(cv2.imdecode(np.frombuffer(png.data, np.uint8), cv2.IMREAD_COLOR),
                       cv2.COLOR_BGR2RGB)
    b = run.store.load(rows[0][1], rows[0][6])
    image = read_frame(FrameFile(run.source / rows[0][0], rows[0][0], rows[0][1]),
                       **read_args(b, run.config)).image
    # the model sees frames aligned and normalised to its reference (Baseline.prepare)
    assert np.array_equal(got, b.model.expected(b.prepare(image[None]))[0])  # PNG is lossless
    # An unflagged frame from the timeline: overlay computed on demand.
    html = client.get("/").get_data(as_text=True)
    point = html.split('data-item="p', 1)[1].split('"', 1)[0]
    assert client.get(f"/img/p{point}/overlay").mimetype == "image/jpeg"
    for bad in ("/img/f1/other", "/img/zz/frame", "/img/f9999/expected"):
        assert client.get(bad).status_code == 404


def test_label_writes_need_the_token_and_valid_json(client, mine):
    assert post_label(client, {"item": "f1", "label": "incident"}, token=None).status_code == 403
    assert post_label(client, {"item": "f1", "label": "incident"}, token="x").status_code == 403
    for raw in ("{not json", "[1, 2]", '"incident"', "", "null"):
        resp = post_label(client, None, raw=raw)
        assert resp.status_code == 400 and "error" in resp.get_json()
    for body in ({"label": "incident"}, {"item": 3, "label": "incident"},
                 {"item": "f1", "label": "maybe"}, {"item": "f1", "label": "unsure", "note": 5},
                 {"item": "f1", "label": "unsure", "note": "x" * 5000}):
        assert post_label(client, body).status_code == 400
    assert post_label(client, {"item": "f9999", "label": "incident"}).status_code == 404
    assert client.get("/api/label").status_code == 405
    ok = post_label(client, {"item": "f1", "label": "false_alarm", "note": "shadow"})
    assert ok.status_code == 200 and ok.get_json()["frames"] == 1
    conn = connect(mine.store.database)
    (row,) = read(conn)
    assert (row.label, row.note, row.rel) == ("false_alarm", "shadow", flagged_rows(mine)[0][0])
    assert row.path == str(mine.source / row.rel) and row.version == "v1"
    html = client.get("/?label=false_alarm").get_data(as_text=True)
    assert html.count('class="row') == 1
    assert post_label(client, {"item": "f1", "label": None}).status_code == 200
    assert read(conn) == []
    conn.close()


def test_host_header_must_name_this_machine(client):
    assert client.get("/", headers={"Host": "evil.example:8765"}).status_code == 400
    assert client.get("/", headers={"Host": "127.0.0.1:8765"}).status_code == 200
    assert client.get("/", headers={"Host": "localhost"}).status_code == 200


def test_events_are_listed_and_labelled_as_a_whole(mine):
    rows = [r for r in flagged_rows(mine)]
    camera = max(("dock", "aisle"), key=lambda c: sum(r[1] == c for r in rows))
    cam = sorted((r for r in rows if r[1] == camera), key=lambda r: r[2])[:3]
    peak = max(cam, key=lambda r: float(r[3]))
    (mine.out / "events.csv").write_text(
        "event,camera,start,end,frames,peak_frame,peak_score\n"
        f"7,{camera},{cam[0][2]},{cam[-1][2]},{len(cam)},{peak[0]},{peak[3]}\n"
        "8,dock,not-a-time,,1,x.jpg,1\n", encoding="utf-8")
    client = create_app(mine.out, mine.store, mine.config, token=TOKEN).test_client()
    html = client.get("/").get_data(as_text=True)
    assert html.count('class="row') == len(rows) - len(cam) + 1
    assert "events.csv row 3 is malformed" in html
    assert "event 7" in client.get("/?item=e1").get_data(as_text=True)
    assert post_label(client, {"item": "e1", "label": "incident"}).get_json()["frames"] == 3
    conn = connect(mine.store.database)
    labels = read(conn)
    conn.close()
    assert sorted(x.rel for x in labels) == sorted(r[0] for r in cam)
    assert {x.event for x in labels} == {"7"}
    html = client.get("/?view=frames").get_data(as_text=True)
    assert html.count('class="row') == len(rows)


def test_compare_endpoint(mine):
    camera = "dock"
    write_ledger(mine.store.database, [(str(p), camera, 1.0)
                                       for p in sorted((mine.source / camera).iterdir())])
    client = create_app(mine.out, mine.store, mine.config, token=TOKEN).test_client()
    assert client.get("/api/compare?camera=dock&version=v7").status_code == 400
    assert client.get("/api/compare?camera=../x&version=v1").status_code == 400
    data = client.get("/api/compare?camera=dock&version=v1").get_json()
    assert "already the active version" in data["text"]


TRAVERSALS = [
    "/files/out/../run.json",
    "/files/out/overlays/../run.json",
    "/files/out/%2e%2e/%2e%2e/etc/passwd",
    "/files/out/..%2f..%2fetc%2fpasswd",
    "/files/out/%2e%2e%2f%2e%2e%2fetc%2fpasswd",
    "/files/out/..%5c..%5cetc%5cpasswd",
    "/files/out/%252e%252e/run.json",
    "/files/out//etc/passwd",
    "/files/out/%2fetc%2fpasswd",
    "/files/store/../../../../etc/passwd",
    "/files/store//etc/passwd",
    "/files/store/inspector.sqlite",
    "/files/out/run.json%00.png",
    "/files/out/",
    "/img/f1/..%2f..%2f..%2fetc%2fpasswd",
    "/static/../server.py",
    "/static/%2e%2e/server.py",
    "/etc/passwd",
]


def test_path_traversal_gets_404_over_real_http(run):
    app = create_app(run.out, run.store, run.config, token=TOKEN, allowed_hosts=LOOPBACK_NAMES)
    with serving(app) as url:
        host, port = url.rsplit("/", 1)[1].split(":")
        for path in TRAVERSALS + ["/files/out/run.json", "/static/review.css"]:
            conn = http.client.HTTPConnection(host, int(port), timeout=30)
            conn.request("GET", path)  # sent exactly as written: no client-side normalising
            resp = conn.getresponse()
            body = resp.read()
            conn.close()
            want = 200 if path in ("/files/out/run.json", "/static/review.css") else 404
            assert resp.status == want, (path, resp.status)
            assert b"root:" not in body and b"Traceback" not in body
        conn = http.client.HTTPConnection(host, int(port), timeout=30)
        conn.request("POST", "/api/label", body=b"\xff\xfe not json",
                     headers={"X-Review-Token": TOKEN, "Content-Type": "application/json"})
        resp = conn.getresponse()
        assert resp.status == 400 and b"Traceback" not in resp.read()
        conn.close()


@pytest.mark.parametrize("host, warned", [("127.0.0.1", False), ("0.0.0.0", True)])
def test_command_binds_loopback_unless_told_and_then_warns(run, host, warned):
    import subprocess
    import sys
    import urllib.request
    from pathlib import Path

    cmd = [sys.executable, "-m", "inspector", "review", "--out", str(run.out), "--config",
           str(run.config_path), "--port", "0"] + (["--host", host] if warned else [])
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True,
                            cwd=Path(__file__).resolve().parents[1])
    try:
        lines = [proc.stdout.readline()]
        if warned:
            lines.append(proc.stdout.readline())
        assert ("warning: listening on 0.0.0.0" in lines[0]) == warned
        url = lines[-1].split("review page: ", 1)[1].split()[0]
        assert url.startswith("http://127.0.0.1:") != warned
        port = url.rstrip("/").rsplit(":", 1)[1]
        page = urllib.request.urlopen(f"http://127.0.0.1:{port}/", timeout=30).read()
        assert b"inspector review" in page
    finally:
        proc.terminate()
        proc.wait(timeout=30)
