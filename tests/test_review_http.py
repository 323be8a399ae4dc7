"""The review server at the HTTP level: pages, pictures, labels, and its safety rules."""

from __future__ import annotations

import csv
import http.client
import json
import shutil
from contextlib import contextmanager

import cv2
import numpy as np
import pytest
from _review_run import copy_run, make_run, serving, write_ledger

from inspector.jobs.scan import read_args
from inspector.review.server import Hosts, create_app
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
    app = create_app(mine.out, mine.store, mine.config, token=TOKEN)
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
    html = client.get("/?sort=newest&label=to_review&since=2026-01-01&until=2030-01-01")
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
    app = create_app(run.out, run.store, run.config, token=TOKEN)
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


@pytest.mark.parametrize("host, warned", [("127.0.0.1", False), ("0.0.0.0", True),
                                          ("127.0.0.2", False)])
def test_command_binds_loopback_unless_told_and_then_warns(run, host, warned):
    import subprocess
    import sys
    import urllib.request
    from pathlib import Path

    cmd = [sys.executable, "-m", "inspector", "review", "--out", str(run.out), "--config",
           str(run.config_path), "--port", "0"] + (["--host", host] if host != "127.0.0.1" else [])
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True,
                            cwd=Path(__file__).resolve().parents[1])
    try:
        lines = [proc.stdout.readline()]
        if warned:
            lines.append(proc.stdout.readline())
        assert ("warning: listening on 0.0.0.0" in lines[0]) == warned
        url = lines[-1].split("review page: ", 1)[1].split()[0]
        assert url.startswith(f"http://{host}:")
        port = url.rstrip("/").rsplit(":", 1)[1]
        # the printed address itself works (the Host check knows the bound address)
        reach = "127.0.0.1" if host == "0.0.0.0" else host
        page = urllib.request.urlopen(f"http://{reach}:{port}/", timeout=30).read()
        assert b"inspector review" in page
        status, _, _ = request(reach, int(port), "GET", "/", host=f"{host}:{port}")
        assert status == 200
    finally:
        proc.terminate()
        proc.wait(timeout=30)


# --- safety of the page: each check drives the real server over HTTP --------------------------

def request(address: str, port: int, method: str, path: str, body: bytes | None = None,
            host: str | None = None, **headers):
    """One request to address:port sent exactly as written (http.client does no
    normalising), with an explicit Host header; returns (status, headers, body)."""
    conn = http.client.HTTPConnection(address, port, timeout=30)
    try:
        conn.putrequest(method, path, skip_host=True, skip_accept_encoding=True)
        conn.putheader("Host", host or f"{address}:{port}")
        for k, v in headers.items():
            conn.putheader(k.replace("_", "-"), v)
        if body is not None:
            conn.putheader("Content-Length", str(len(body)))
        conn.endheaders(body)
        resp = conn.getresponse()
        return resp.status, resp.headers, resp.read()
    finally:
        conn.close()


@contextmanager
def live(app, host="127.0.0.1", **options):
    with serving(app, host, **options) as url:
        yield host, int(url.rsplit(":", 1)[1])


def label_body(item="f1", label="unsure", note="") -> bytes:
    return json.dumps({"item": item, "label": label, "note": note}).encode()


WRITE = {"X_Review_Token": TOKEN, "Content_Type": "application/json"}


@pytest.fixture()
def outside_world(mine, tmp_path):
    """A scanned folder (a copy) with a link leading out of it, a results folder with rows
    naming a frame by absolute path and through that link, and a saved overlay that is a
    link out of the results folder."""
    source = tmp_path / "scanned"
    shutil.copytree(mine.source, source)
    secret_dir = tmp_path / "elsewhere"
    secret_dir.mkdir()
    first = min((source / "dock").iterdir())
    secret = secret_dir / "secret.jpg"
    shutil.copy(first, secret)  # a real, readable frame: only the boundary can stop it
    (source / "dock" / "escape.jpg").symlink_to(secret)
    overlay_dir = mine.out / "overlays" / "dock"
    overlay_dir.mkdir(parents=True, exist_ok=True)
    (overlay_dir / "linked.jpg").symlink_to(secret)
    rows = (mine.out / "flagged.csv").read_text(encoding="utf-8").splitlines()
    n = len(rows)  # ids of the added rows: f{n}, f{n+1}, f{n+2}, f{n+3}
    extra = ["dock/escape.jpg,dock,2026-12-01T08:00:00,9.0,1.0,0.01,v1,",
             f"{secret},dock,2026-12-01T08:00:01,9.0,1.0,0.01,v1,",
             f"{first.relative_to(source)},dock,2026-12-01T08:00:02,9.0,1.0,0.01,v1,linked.jpg",
             (f"{first.relative_to(source)},../../elsewhere,2026-12-01T08:00:03,9.0,1.0,0.01,v1,"
             "secret.jpg")]
    (mine.out / "flagged.csv").write_text("\n".join(rows + extra) + "\n", encoding="utf-8")
    return source, [f"f{n + k}" for k in range(4)], secret


def test_no_picture_comes_from_outside_the_folders(mine, outside_world):
    """Issue 16 item 1: frames, saved overlays and computed pictures all pass one boundary
    check; a link out of a folder and an absolute path get the same 404 as a missing file."""
    source, (linked, absolute, linked_overlay, climbing), secret = outside_world
    app = create_app(mine.out, mine.store, mine.config, token=TOKEN, source=source)
    with live(app) as (host, port):
        answers = set()
        for item in (linked, absolute):
            for kind in ("frame", "overlay", "expected"):
                status, _headers, body = request(host, port, "GET", f"/img/{item}/{kind}")
                assert status == 404, (item, kind, status)
                answers.add(body)
        # a saved overlay that links out of the results folder, or climbs out through its
        # camera name, is not served (the linked one is drawn afresh from its frame instead)
        status, _, body = request(host, port, "GET", f"/img/{linked_overlay}/overlay")
        assert status == 200 and body != secret.read_bytes()
        status, _, body = request(host, port, "GET", f"/img/{climbing}/overlay")
        assert status == 404 and b"Traceback" not in body
        secret.unlink()  # a missing file outside answers exactly as an existing one did
        for kind in ("frame", "overlay"):
            answers.add(request(host, port, "GET", f"/img/{linked}/{kind}")[2])
        assert len(answers) == 1, answers


def test_compare_reads_no_ledger_frame_outside_the_folder(mine, outside_world):
    """Closing note item 1: the comparison scores ledger frames only through the page's
    boundary check; rows naming a real frame outside the scanned folder (by absolute path,
    by '..', through a link) are left out and counted, never decoded."""
    source, _, secret = outside_world
    for camera in ("dock", "aisle"):
        shutil.copytree(mine.store.root / camera / "v1", mine.store.root / camera / "v2")
    inside_frames = sorted(p for p in (source / "dock").iterdir() if not p.is_symlink())
    outside = [secret, source / "dock" / ".." / ".." / "elsewhere" / secret.name,
               source / "dock" / "escape.jpg"]
    elsewhere = [shutil.copy(secret, secret.with_name(f"aisle{k}.jpg")) for k in range(3)]
    write_ledger(mine.store.database, [(str(p), "dock", 1.0) for p in inside_frames + outside]
                 + [(str(p), "aisle", 1.0) for p in elsewhere])
    client = create_app(mine.out, mine.store, mine.config, token=TOKEN,
                        source=source).test_client()
    data = client.get("/api/compare?camera=dock&version=v2").get_json()
    assert data["frames"] == len(inside_frames), data
    assert f"{len(outside)} outside the folder left out" in data["text"]
    data = client.get("/api/compare?camera=aisle&version=v2").get_json()
    assert data["frames"] == 0 and "none of the last 3 scored frames is inside" in data["text"]


def test_host_allow_list_on_every_bind(mine):
    """Issue 16 items 2 and 6: a page bound to every address still refuses foreign names
    (DNS rebinding), answers to this machine's names, the bound address and added names."""
    import socket

    app = create_app(mine.out, mine.store, mine.config, token=TOKEN,
                     hosts=Hosts.for_bind("0.0.0.0", ["proxy.example"]))
    with live(app) as (host, port):
        status, _, body = request(host, port, "GET", "/", host="rebind.evil.example:8765")
        assert status == 400 and TOKEN.encode() not in body
        status, _, _ = request(host, port, "POST", "/api/label", label_body(),
                               host="rebind.evil.example", **WRITE)
        assert status == 400
        for name in ("localhost:8765", "127.0.0.1", "[::1]:8765", "0.0.0.0:8765",
                     "proxy.example", f"{socket.gethostname()}:8765", "PROXY.example."):
            assert request(host, port, "GET", "/", host=name)[0] == 200, name
    loop = create_app(mine.out, mine.store, mine.config, token=TOKEN)
    with live(loop) as (host, port):
        assert request(host, port, "GET", "/", host="evil.example:8765")[0] == 400
        assert request(host, port, "GET", "/", host="proxy.example")[0] == 400
    assert Hosts.for_bind("127.0.0.2").allows("127.0.0.2:8765")


def test_files_are_images_inline_and_everything_else_a_sandboxed_download(mine):
    """Issue 16 item 3: no HTML, SVG or script from the results folder runs on the page's
    origin; the page's own script is the only one allowed."""
    (mine.out / "evil.html").write_text("<script>alert(1)</script>", encoding="utf-8")
    (mine.out / "evil.svg").write_text('<svg xmlns="http://www.w3.org/2000/svg">'
                                       "<script>alert(1)</script></svg>", encoding="utf-8")
    (mine.out / "evil.js").write_text("alert(1)", encoding="utf-8")
    overlay = next((mine.out / "overlays").rglob("*.jpg")).relative_to(mine.out).as_posix()
    app = create_app(mine.out, mine.store, mine.config, token=TOKEN)
    with live(app) as (host, port):
        for name in ("evil.html", "evil.svg", "evil.js", "flagged.csv", "run.json"):
            status, headers, _ = request(host, port, "GET", f"/files/out/{name}")
            assert status == 200
            assert headers["Content-Disposition"].startswith("attachment"), name
            assert "sandbox" in headers["Content-Security-Policy"]
            assert not headers["Content-Type"].startswith(("text/html", "image/svg",
                                                           "text/javascript"))
        status, headers, _ = request(host, port, "GET", f"/files/out/{overlay}")
        assert status == 200 and headers["Content-Type"] == "image/jpeg"
        assert not headers.get("Content-Disposition", "").startswith("attachment")
        assert headers["Cross-Origin-Resource-Policy"] == "same-origin"
        status, headers, page = request(host, port, "GET", "/")
        csp = headers["Content-Security-Policy"]
        script_src = csp.split("script-src ", 1)[1].split(";")[0].split()
        nonce = page.split(b'<script nonce="')[1].split(b'"')[0].decode()
        assert script_src == [f"'nonce-{nonce}'"] and len(nonce) >= 16
        assert "'self'" not in script_src and "unsafe" not in csp
        assert headers["Cache-Control"] == "no-store"  # the page carries the token
        for kind in ("frame", "overlay", "expected"):
            status, headers, _ = request(host, port, "GET", f"/img/f1/{kind}")
            assert status == 200 and headers["Cross-Origin-Resource-Policy"] == "same-origin"
            assert "sandbox" in headers["Content-Security-Policy"]


def test_malformed_requests_get_4xx_not_500(mine):
    """Issue 16 item 4: an over-long path segment, a lone surrogate in a note and deeply
    nested JSON are refused with a one-line reason."""
    app = create_app(mine.out, mine.store, mine.config, token=TOKEN)
    with live(app) as (host, port):
        long = "a" * 5000
        for path in (f"/files/out/{long}", f"/files/store/{long}/x.png", f"/img/{long}/frame",
                     f"/files/out/overlays/{long}.jpg"):
            status, _, body = request(host, port, "GET", path)
            assert status == 404 and b"Traceback" not in body, path
        # "\ud800" is valid JSON, but not text that can be stored
        raw = b'{"item": "f1", "label": "unsure", "note": "\\ud800"}'
        status, _, body = request(host, port, "POST", "/api/label", raw, **WRITE)
        assert status == 400 and b"note" in body
        status, _, _ = request(host, port, "POST", "/api/label", b'{"item": "\\udfff"}', **WRITE)
        assert status == 400
        nested = b'{"a":' * 5000 + b"1" + b"}" * 5000  # deeper than Python's recursion limit
        status, _, body = request(host, port, "POST", "/api/label", nested, **WRITE)
        assert status == 400 and b"JSON object" in body
        status, _, _ = request(host, port, "POST", "/api/label", b"[" * 60000, **WRITE)
        assert status in (400, 413)


def test_logged_paths_are_escaped(mine, capfd):
    """Issue 16 item 5: a crafted URL cannot write terminal escapes to the operator's log."""
    app = create_app(mine.out, mine.store, mine.config, token=TOKEN)

    def boom(rest):
        raise RuntimeError("failed on purpose \x1b[2J")

    app.add_url_rule("/boom/<path:rest>", view_func=boom)
    with live(app) as (host, port):
        status, _, body = request(host, port, "GET", "/boom/%1b%5b31mred%1b%5d0;title%07")
        assert status == 500 and body == b"500 Internal Server Error\n"
    err = capfd.readouterr().err
    assert "/boom/" in err and "\x1b" not in err and "\x07" not in err
    assert "\\x1b[31mred" in err


def test_writes_refused_from_other_sites_and_smaller_hardening(mine):
    """Issue 16 item 6: Sec-Fetch-Site and Origin on writes, no server version, a read
    timeout."""
    import socket

    app = create_app(mine.out, mine.store, mine.config, token=TOKEN)
    with live(app, timeout=0.5) as (host, port):
        here = f"{host}:{port}"
        for extra in ({"Sec_Fetch_Site": "cross-site"}, {"Sec_Fetch_Site": "same-site"},
                      {"Origin": "http://evil.example"}, {"Origin": "null"},
                      {"Origin": f"http://{host}:{port + 1}"}):
            status, _, _ = request(host, port, "POST", "/api/label", label_body(),
                                   **WRITE, **extra)
            assert status == 403, extra
        status, headers, _ = request(host, port, "POST", "/api/label", label_body(), **WRITE,
                                     Origin=f"http://{here}", Sec_Fetch_Site="same-origin")
        assert status == 200
        assert "Server" not in headers
        for path in ("/", "/static/review.js", "/nothing"):
            assert "Server" not in request(host, port, "GET", path)[1]
        # a connection that sends half a request is dropped, not kept open for ever
        with socket.create_connection((host, port), timeout=30) as s:
            s.sendall(b"GET / HTTP/1.1\r\nHost: " + here.encode() + b"\r\n")
            assert s.recv(100) == b""


def test_switching_the_active_baseline_from_the_page(mine):
    """Issue 13 item 5: the versions table switches the active baseline, token-protected
    like label writes, only for the active version the comparison was shown against."""
    shutil.copytree(mine.store.root / "dock" / "v1", mine.store.root / "dock" / "v2")
    app = create_app(mine.out, mine.store, mine.config, token=TOKEN)
    html = app.test_client().get("/?camera=dock").get_data(as_text=True)
    assert 'class="activate" hidden data-camera="dock" data-version="v2"' in html
    with live(app) as (host, port):
        body = json.dumps({"camera": "dock", "version": "v2", "active": "v1"}).encode()
        assert request(host, port, "POST", "/api/activate", body,
                       Content_Type="application/json")[0] == 403
        assert request(host, port, "POST", "/api/activate", body, **WRITE,
                       Sec_Fetch_Site="cross-site")[0] == 403
        stale = json.dumps({"camera": "dock", "version": "v2", "active": ""}).encode()
        assert request(host, port, "POST", "/api/activate", stale, **WRITE)[0] == 409
        assert mine.store.active_version("dock") == "v1"
        status, _, shown = request(host, port, "GET", "/api/compare?camera=dock&version=v2")
        assert status == 200 and json.loads(shown)["active"] == "v1"
        status, _, answer = request(host, port, "POST", "/api/activate", body, **WRITE)
        assert status == 200 and json.loads(answer)["was"] == "v1"
        assert mine.store.active_version("dock") == "v2"
        # the same request again: the comparison it rests on is out of date
        assert request(host, port, "POST", "/api/activate", body, **WRITE)[0] == 409
        # a damaged version is neither compared nor switched to, with the reason
        shutil.copytree(mine.store.root / "dock" / "v1", mine.store.root / "dock" / "v3")
        (mine.store.root / "dock" / "v3" / "calibration.npz").write_bytes(b"not an npz")
        write_ledger(mine.store.database, [(str(p), "dock", 1.0)
                                           for p in sorted((mine.source / "dock").iterdir())])
        status, _, why = request(host, port, "GET", "/api/compare?camera=dock&version=v3")
        assert status == 200 and b"damaged" in why  # said, not a failure
        damaged = json.dumps({"camera": "dock", "version": "v3", "active": "v2"}).encode()
        assert request(host, port, "POST", "/api/activate", damaged, **WRITE)[0] == 409
        assert mine.store.active_version("dock") == "v2"
        assert request(host, port, "GET", "/?camera=dock")[0] == 200
        for bad in ({"camera": "dock", "version": "v9", "active": "v2"},
                    {"camera": "../dock", "version": "v1", "active": "v2"}, {"camera": 3}):
            assert request(host, port, "POST", "/api/activate", json.dumps(bad).encode(),
                           **WRITE)[0] == 400


def test_results_written_before_the_renames_are_still_read(mine):
    """Issue 13: folders whose flagged.csv names the baseline column ``model`` and whose
    events.csv counts in ``frames`` still show and label as before."""
    for name in ("flagged.csv", "all_scores.csv"):
        path = mine.out / name
        lines = path.read_text(encoding="utf-8").splitlines()
        assert ",baseline," in lines[0]
        lines[0] = lines[0].replace(",baseline,", ",model,")
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    client = create_app(mine.out, mine.store, mine.config, token=TOKEN).test_client()
    html = client.get("/?item=f1").get_data(as_text=True)
    assert "<dt>baseline</dt><dd>v1</dd>" in html
    assert post_label(client, {"item": "f1", "label": "unsure"}).status_code == 200
    conn = connect(mine.store.database)
    assert [x.version for x in read(conn)] == ["v1"]
    conn.close()
    assert client.get("/?label=unlabelled").status_code == 200  # an old link still works


def test_a_frame_judged_with_amplified_noise_says_so_on_the_page(mine):
    path = mine.out / "flagged.csv"
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    plain = next(k for k, r in enumerate(rows) if not r["noise_amplified"]) + 1
    rows[plain % len(rows)]["noise_amplified"] = "1.800"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    client = create_app(mine.out, mine.store, mine.config, token=TOKEN).test_client()
    html = client.get(f"/?item=f{plain % len(rows) + 1}").get_data(as_text=True)
    assert "<dt>noise</dt>" in html and "amplified 1.80 times: darker than every" in html
    assert "<dt>noise</dt>" not in client.get(f"/?item=f{plain}").get_data(as_text=True)
