"""The review page: a small Flask app over a results folder and the baseline store.

Routes are small functions below, registered by :func:`create_app`; what they share (the
results folder, the store, the token, the loaded baselines) is one :class:`Review` object.

Safety (README "Safety of the page" says the same for users):

* every file the page reads (frames, saved overlays, the pictures computed from a frame,
  ``/files/...``, the ledger's frames a baseline comparison scores) goes through
  :func:`inside`: it must resolve, links followed, to a file
  inside the scanned folder, the results folder or the store; anything else is the same
  one-line 404;
* the Host header must name this machine (:class:`Hosts`), on every bind, against DNS
  rebinding;
* ``/files/...`` serves images inline and everything else as a download, sandboxed; the
  page runs only its own script (a nonce per page);
* writes need the per-run token, a JSON object, and no foreign ``Origin`` or cross-site
  ``Sec-Fetch-Site``; malformed requests get a 400 with a one-line reason, never a
  traceback, and what is logged is escaped.
"""

from __future__ import annotations

import ipaddress
import json
import math
import os
import secrets
import socket
import sys
import threading
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np
from flask import (
    Flask,
    Response,
    abort,
    current_app,
    g,
    jsonify,
    render_template,
    request,
    send_file,
)
from markupsafe import Markup
from werkzeug.exceptions import HTTPException
from werkzeug.security import safe_join
from werkzeug.serving import (
    BaseWSGIServer,
    WSGIRequestHandler,
    get_sockaddr,
    select_address_family,
)
from werkzeug.serving import make_server as _werkzeug_server

from inspector.config import Config
from inspector.core.baseline import Baseline
from inspector.errors import FrameError, UsageError
from inspector.jobs.compare import COMPARE_FRAMES, compare_versions, version_rows
from inspector.jobs.scan import BaselineCache, in_stream, read_args, score_frames
from inspector.review.data import (
    UNREVIEWED,
    Item,
    Results,
    parse_filters,
    select,
    timeline_svg,
)
from inspector.storage.frames import FrameFile, read_frame, sniff
from inspector.storage.labels import (
    LABEL_TEXT,
    LABELS,
    Label,
    connect,
    now,
    put,
    read,
    remove,
)
from inspector.storage.results import overlay_picture
from inspector.storage.store import Store

#: The longest note kept with a label.
MAX_NOTE = 2000
#: Seconds a connection may stay silent before the server drops it.
READ_TIMEOUT = 20.0
LOOPBACK_NAMES = frozenset({"127.0.0.1", "localhost", "::1"})
#: The one answer for a file that is missing, unreadable or outside the allowed folders.
NO_FILE = "no such file here"
#: Types served inline by /files/... (the page shows images); anything else is a download.
INLINE = {".jpg": "image/jpeg", ".jpeg": "image/jpeg", ".png": "image/png"}
DOWNLOAD = {".csv": "text/csv; charset=utf-8", ".json": "application/json"}
_MIME = {"jpeg": "image/jpeg", "png": "image/png", "bmp": "image/bmp", "tiff": "image/tiff"}
_CSP = ("default-src 'none'; img-src 'self'; style-src 'self'; script-src 'nonce-{nonce}'; "
        "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'")
_FILE_CSP = "default-src 'none'; sandbox"


# --- what the routes share ----------------------------------------------------------------

@dataclass(frozen=True)
class Hosts:
    """Host header names the page answers to (DNS rebinding guard).

    A page bound to a wildcard address (0.0.0.0, ::) also answers to any IP address
    written as such: a rebinding attack needs a name it controls, never a bare address.
    """

    names: frozenset[str]
    any_address: bool = False

    @classmethod
    def for_bind(cls, host: str, extra: Iterable[str] = ()) -> Hosts:
        """Loopback names, the bound address, this machine's host names and ``extra``."""
        bound = host.strip("[]").lower()
        names = set(LOOPBACK_NAMES) | {bound} | {_norm(n) for n in extra}
        try:
            wildcard = ipaddress.ip_address(bound).is_unspecified
        except ValueError:
            wildcard = False
        name = socket.gethostname().lower()
        names |= {name, name.split(".")[0]}
        return cls(frozenset(n for n in names if n), wildcard)

    def allows(self, header: str) -> bool:
        name = _host_name(header)
        if name in self.names:
            return True
        if self.any_address:
            try:
                ipaddress.ip_address(name)
                return True
            except ValueError:
                return False
        return False


def _norm(name: str) -> str:
    return name.strip().strip("[]").rstrip(".").lower()


def _host_name(header: str) -> str:
    """The name of a Host header, without port or IPv6 brackets, lower case."""
    h = (header or "").strip().lower()
    if h.startswith("["):
        return h[1:h.find("]")] if "]" in h else ""
    return _norm(h.rsplit(":", 1)[0] if h.count(":") == 1 else h)


def is_loopback(host: str) -> bool:
    if host.strip("[]").lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


@dataclass
class Review:
    """The state behind one review page."""

    results: Results
    store: Store
    config: Config
    token: str
    hosts: Hosts
    baselines: BaselineCache
    compared: dict[tuple[str, str, str], dict] = field(default_factory=dict)
    compute: threading.Lock = field(default_factory=threading.Lock)

    def labels(self) -> dict[tuple[str, str], Label]:
        if not self.store.database.is_file():
            return {}
        conn = connect(self.store.database)
        try:
            return {(lab.camera, lab.path): lab for lab in read(conn)}
        finally:
            conn.close()

    def item(self, item_id: str) -> Item:
        self.results.refresh()
        item = self.results.items.get(item_id)
        if item is None:
            abort(404, f"no item {item_id!r}")
        return item

    def baseline(self, item: Item) -> Baseline:
        """The baseline version that scored the item (the active one if that is unknown)."""
        try:
            known = item.version in self.store.versions(item.camera)
            return self.baselines.get(item.camera, item.version if known else None)
        except (UsageError, OSError, ValueError):
            raise LookupError(f"no baseline for camera {item.camera}") from None

    def frame(self, item: Item) -> Path:
        """The item's frame file, inside the scanned folder, or a 404."""
        return inside(self.results.source, item.rel) or abort(404, NO_FILE)

    def ledger_frame(self, path: str) -> Path | None:
        """A frame path from the store's ledger, if it is a file inside the scanned folder
        (through :func:`inside`, like every file the page reads), else None."""
        try:
            rel = os.path.relpath(path, Path(self.results.source).resolve())
        except ValueError:
            return None
        return inside(self.results.source, Path(rel).as_posix())


def _review() -> Review:
    return current_app.extensions["inspector_review"]


def inside(root: Path, rel: str) -> Path | None:
    """``root/rel`` if it is an existing file inside ``root`` (links followed), else None.

    The one boundary check of the page: absolute paths, any ``..``, NUL, backslashes, links
    that lead out of ``root`` and names the system refuses (too long) are all None.
    """
    if not rel or "\x00" in rel or "\\" in rel or ".." in rel.split("/"):
        return None  # any '..' is an attempt to climb out, even one that would land inside
    joined = safe_join(str(root), rel)
    if joined is None:
        return None
    try:
        path = Path(joined).resolve()
        base = Path(root).resolve()
        if base not in path.parents or not path.is_file():
            return None
    except (OSError, ValueError, RuntimeError):
        return None
    return path


# --- the app --------------------------------------------------------------------------------

def create_app(out: Path, store: Store, config: Config, token: str | None = None,
               hosts: Hosts | None = None, source: Path | None = None) -> Flask:
    """The review web app.

    Parameters
    ----------
    out : Path
        Results folder (flagged.csv, overlays, run.json, events.csv).
    store : Store
        Baselines and the SQLite file with labels and the frame ledger.
    token : str, optional
        Per-run token required on writes (a fresh random one by default).
    hosts : Hosts, optional
        Host header names accepted (default: those of a page bound to 127.0.0.1).
    source : Path, optional
        The scanned folder, instead of the one in ``OUT/run.json``.
    """
    app = Flask(__name__)
    app.config["MAX_CONTENT_LENGTH"] = 64 * 1024
    app.url_map.merge_slashes = False  # "//etc/passwd" must reach the 404, not a redirect
    app.json.sort_keys = False
    review = Review(results=Results(Path(out), source=source, database=store.database),
                    store=store, config=config, token=token or secrets.token_urlsafe(24),
                    hosts=hosts or Hosts.for_bind("127.0.0.1"),
                    baselines=BaselineCache(store))
    app.extensions["inspector_review"] = review
    app.before_request(check_host)
    app.after_request(security_headers)
    app.register_error_handler(HTTPException, http_error)
    app.register_error_handler(Exception, failure)
    for rule, view, methods in ROUTES:
        app.add_url_rule(rule, view_func=view, methods=methods)
    return app


def check_host():
    if not _review().hosts.allows(request.host):
        abort(400, "unexpected Host header (add the name with --allow-host)")


def security_headers(resp: Response) -> Response:
    resp.headers["X-Content-Type-Options"] = "nosniff"
    resp.headers["X-Frame-Options"] = "DENY"
    resp.headers["Referrer-Policy"] = "no-referrer"
    resp.headers.setdefault("Content-Security-Policy",
                            _CSP.format(nonce=g.get("nonce", "none")))
    return resp


def http_error(exc: HTTPException):
    text = exc.description if isinstance(exc.description, str) else exc.name
    text = text.encode("utf-8", "backslashreplace").decode("utf-8")
    if request.path.startswith("/api/"):
        return jsonify(error=text), exc.code
    return Response(f"{exc.code} {exc.name}: {text}\n", exc.code, mimetype="text/plain")


def failure(exc: Exception):
    print(f"review: {request.method} {printable(request.path)} failed: "
          f"{type(exc).__name__}: {printable(str(exc))}", file=sys.stderr)
    return Response("500 Internal Server Error\n", 500, mimetype="text/plain")


def printable(text: str) -> str:
    """``text`` safe for a terminal: control characters and the like as escapes."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape", "backslashreplace")
                   .decode("ascii") for c in text)


# --- routes ---------------------------------------------------------------------------------

def index():
    r = _review()
    try:
        f = parse_filters(request.args)
    except ValueError as exc:
        abort(400, str(exc))
    results = r.results
    results.refresh()
    labels = r.labels()
    label_of = {k: v.label for k, v in labels.items()}
    items = results.frames if f.view == "frames" else results.listed
    shown = select(items, f, label_of)
    cameras = sorted({i.camera for i in results.listed} | set(r.store.cameras()))
    wanted = request.args.get("item", "")
    current = results.items.get(wanted) if wanted else (shown[0] if shown else None)
    if wanted and current is None:
        abort(404, f"no item {wanted!r}")
    link = f"?{f.query()}&item="
    shown_cams = [f.camera] if f.camera else cameras
    g.nonce = secrets.token_urlsafe(16)
    page = render_template(
        "index.html", f=f, shown=shown, counts=_counts(cameras, items, label_of),
        cameras=cameras, current=current, detail=_detail(r, current, labels),
        label_of=label_of, timelines=_timelines(results, f, shown_cams, link, current, label_of),
        versions=_versions(r.store, shown_cams), token=r.token, nonce=g.nonce,
        labels=LABELS, label_text=LABEL_TEXT, unreviewed=UNREVIEWED, link=link,
        results=results, fmt=_fmt)
    return Response(page, mimetype="text/html", headers={"Cache-Control": "no-store"})


def _counts(cameras: list[str], items: list[Item], label_of: dict) -> list[dict]:
    counts = []
    for cam in cameras:
        labs = [label_of.get((cam, str(i.path)), "") for i in items if i.camera == cam]
        counts.append({"camera": cam, "flags": len(labs), "reviewed": sum(map(bool, labs)),
                       "incidents": labs.count("incident"),
                       "false_alarms": labs.count("false_alarm")})
    return counts


def _timelines(results: Results, f, cameras: list[str], link: str, current: Item | None,
               label_of: dict[tuple[str, str], str]):
    events = [i for i in results.listed if i.kind == "event"]
    points = [p for p in results.points
              if (not f.since or p.time.date() >= f.since)
              and (not f.until or p.time.date() <= f.until)]
    return [(cam, Markup(timeline_svg(cam, points, events, link,
                                      current.id if current else "", labels=label_of)))
            for cam in cameras]


def _versions(store: Store, cameras: list[str]) -> dict[str, list[dict]]:
    versions = {}
    for cam in cameras:
        try:
            versions[cam] = version_rows(store, cam)
        except UsageError:  # a camera name in the results that cannot be a store folder
            versions[cam] = []
    return versions


def _detail(r: Review, current: Item | None, labels: dict) -> dict | None:
    if current is None:
        return None
    lab = labels.get((current.camera, str(current.path)))
    try:
        kind = r.baseline(current).model.kind
    except (LookupError, OSError, ValueError):
        kind = ""
    return {"item": current, "label": lab.label if lab else "", "note": lab.note if lab else "",
            "kind": kind}


def favicon():
    return Response(status=204)


def image(item_id: str, kind: str):
    r = _review()
    item = r.item(item_id)
    if kind not in ("frame", "overlay", "expected"):
        abort(404, f"no picture {kind!r}")
    path = r.frame(item)  # every picture of an item starts from its frame in the folder
    if kind == "frame":
        try:
            with open(path, "rb") as fh:
                mime = _MIME.get(sniff(fh.read(16)) or "", "application/octet-stream")
        except OSError:
            abort(404, NO_FILE)
        return _file_response(send_file(path, mimetype=mime, max_age=3600))
    saved = inside(r.results.out, item.overlay) if kind == "overlay" and item.overlay else None
    if saved is not None:
        return _file_response(send_file(saved, mimetype="image/jpeg", max_age=3600))
    try:
        data = drawn_picture(r, item, path, kind)
    except FrameError as exc:
        abort(404, f"frame cannot be read: {exc}")
    except (LookupError, OSError, ValueError) as exc:
        abort(404, f"no picture: {exc}")
    mime = "image/png" if kind == "expected" else "image/jpeg"
    return _file_response(Response(data, mimetype=mime,
                                   headers={"Cache-Control": "max-age=3600"}))


def drawn_picture(r: Review, item: Item, path: Path, kind: str) -> bytes:
    """What the model expected at the item's frame (PNG), or its overlay (JPEG), computed;
    the overlay drawn as a scan draws it (:func:`inspector.storage.results.overlay_picture`)."""
    b = r.baseline(item)
    file = FrameFile(path, item.rel, item.camera)
    frame = read_frame(file, **read_args(b, r.config))
    with r.compute:  # one model evaluation at a time on a 2-core machine
        if kind == "expected":
            return _encode(b.model.expected(b.prepare(frame.image[None]))[0], ".png")
        # A camera with persistence: its region over the frames before it, as scanned.
        scored = in_stream(b, r.config, file, r.results.source / item.camera, frame)
        if scored is None:
            scored = score_frames(b.continue_from(None), [frame])[0]
    _ok, buf = cv2.imencode(".jpg", overlay_picture(scored), [cv2.IMWRITE_JPEG_QUALITY, 90])
    return buf.tobytes()


def _encode(rgb: np.ndarray, ext: str) -> bytes:
    ok, buf = cv2.imencode(ext, cv2.cvtColor(np.ascontiguousarray(rgb), cv2.COLOR_RGB2BGR))
    if not ok:
        raise ValueError("could not encode image")
    return buf.tobytes()


def out_file(rel: str):
    return _serve_file(_review().results.out, rel)


def store_file(rel: str):
    if rel.rsplit("/", 1)[-1].startswith("inspector.sqlite"):
        abort(404, NO_FILE)
    return _serve_file(_review().store.root, rel)


def _serve_file(root: Path, rel: str):
    """A file under ``root``: images inline, anything else as a download; sandboxed."""
    path = inside(root, rel) or abort(404, NO_FILE)
    ext = path.suffix.lower()
    if ext in INLINE:
        return _file_response(send_file(path, mimetype=INLINE[ext], max_age=60))
    return _file_response(send_file(path, mimetype=DOWNLOAD.get(ext, "application/octet-stream"),
                                    as_attachment=True, download_name=path.name, max_age=60))


def _file_response(resp: Response) -> Response:
    resp.headers["Content-Security-Policy"] = _FILE_CSP
    resp.headers["Cross-Origin-Resource-Policy"] = "same-origin"
    return resp


def set_label():
    r = _review()
    data = _write_request(r)
    item_id, label = _text(data, "item"), data.get("label")
    note = _text(data, "note", default="", limit=MAX_NOTE)
    if label not in LABELS and label not in (None, ""):
        abort(400, f"'label' must be one of {', '.join(LABELS)} or null to clear")
    item = r.item(item_id)
    conn = connect(r.store.database)
    try:
        if not label:
            return jsonify(item=item.id, label=None, frames=remove(conn, item.camera,
                                                                    item.members))
        rows = _label_rows(r.results, item, label, note.strip())
        put(conn, rows)
    finally:
        conn.close()
    return jsonify(item=item.id, label=label, frames=len(rows))


def _label_rows(results: Results, item: Item, label: str, note: str) -> list[Label]:
    """One label row per flagged frame of the item (one for a frame, all for an event)."""
    by_path = {str(f.path): f for f in results.frames}
    stamp = now()
    rows = []
    for m in item.members:
        fr = by_path.get(m, item if m == str(item.path) else None)
        rows.append(Label(
            camera=item.camera, path=m, rel=fr.rel if fr else Path(m).name, event=item.event,
            label=label, note=note, score=_num(fr.score) if fr else None,
            threshold=_num(fr.threshold) if fr else None,
            version=fr.version if fr else item.version,
            capture_time=fr.time.isoformat() if fr else "", labelled_at=stamp))
    return rows


def _write_request(r: Review) -> dict:
    """The JSON object of a write, after the token, Origin and Sec-Fetch-Site checks."""
    given = request.headers.get("X-Review-Token", "")
    if not given or not secrets.compare_digest(given.encode(), r.token.encode()):
        abort(403, "missing or wrong review token (reload the page)")
    origin = request.headers.get("Origin")
    if origin is not None and origin.split("://", 1)[-1].lower() != request.host.lower():
        abort(403, "writes are accepted only from the review page itself")
    if request.headers.get("Sec-Fetch-Site", "same-origin") not in ("same-origin", "none"):
        abort(403, "writes are accepted only from the review page itself")
    try:
        data = json.loads(request.get_data().decode("utf-8"))
    except (ValueError, RecursionError):  # UnicodeDecodeError is a ValueError
        abort(400, "expected a JSON object")
    if not isinstance(data, dict):
        abort(400, "expected a JSON object")
    return data


def _text(data: dict, key: str, default: str | None = None, limit: int = 200) -> str:
    """A string field of a write: present (unless defaulted), at most ``limit`` characters,
    and valid text (no lone surrogates)."""
    value = data.get(key, default)
    ok = isinstance(value, str) and len(value) <= limit
    if ok:
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            ok = False
    if not ok:
        abort(400, f"{key!r} must be a text of at most {limit} characters")
    return value


def compare():
    r = _review()
    camera, version = request.args.get("camera", ""), request.args.get("version", "")
    return jsonify(_comparison(r, camera, version))


def _comparison(r: Review, camera: str, version: str) -> dict:
    """How flags would change if ``version`` replaced the camera's active baseline (cached)."""
    try:
        known = camera in r.store.cameras() and version in r.store.versions(camera)
    except (UsageError, OSError):
        known = False
    if not known:
        abort(400, "unknown camera or version")
    active = r.store.active_version(camera)
    key = (camera, active or "", version)
    if key not in r.compared:
        try:
            c = compare_versions(r.store, r.config, camera, active, version, COMPARE_FRAMES,
                                 within=r.ledger_frame)
        except LookupError as exc:  # a damaged version: says what is wrong and what to do
            abort(409, str(exc))
        ch = c.change
        r.compared[key] = {"camera": camera, "active": active, "version": version,
                           "text": c.text(), "frames": ch.frames if ch else 0,
                           "added": ch.added if ch else None,
                           "removed": ch.removed if ch else None}
    return r.compared[key]


def activate():
    """Make a version active, once its comparison with the active one has been shown.

    The request names the version it was compared against (``active``): if the active
    version changed since, the switch is refused (409) and the page shows a new comparison.
    """
    r = _review()
    data = _write_request(r)
    camera, version = _text(data, "camera"), _text(data, "version")
    seen = _text(data, "active", default="")
    shown = _comparison(r, camera, version)
    if (shown["active"] or "") != seen:
        abort(409, f"the active version of {camera} is now {shown['active'] or 'none'}; "
                   "compare again before switching")
    try:
        r.store.activate(camera, version)
    except UsageError as exc:  # a damaged version is refused
        abort(409, str(exc))
    r.baselines.forget(camera)
    return jsonify(camera=camera, active=version, was=shown["active"], text=shown["text"])


#: (rule, view, methods) of every route.
ROUTES = [
    ("/", index, ["GET"]),
    ("/favicon.ico", favicon, ["GET"]),
    ("/img/<item_id>/<kind>", image, ["GET"]),
    ("/files/out/<path:rel>", out_file, ["GET"]),
    ("/files/store/<path:rel>", store_file, ["GET"]),
    ("/api/label", set_label, ["POST"]),
    ("/api/compare", compare, ["GET"]),
    ("/api/activate", activate, ["POST"]),
]


# --- serving ----------------------------------------------------------------------------------

class _Handler(WSGIRequestHandler):
    """Werkzeug's handler with a read timeout and no Server header."""

    timeout = READ_TIMEOUT

    def send_response(self, code, message=None):  # as http.server's, without "Server"
        self.log_request(code)
        self.send_response_only(code, message)
        self.send_header("Date", self.date_time_string())


def make_server(app: Flask, host: str, port: int,
                timeout: float = READ_TIMEOUT) -> BaseWSGIServer:
    """A threaded server for the page (the caller runs ``serve_forever``).

    Raises OSError when ``host:port`` cannot be listened on (an unknown name, a port in
    use): werkzeug itself would print the reason and exit the process.
    """
    family = select_address_family(host, port)
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        probe.bind(get_sockaddr(host, port, family))
    handler = type("Handler", (_Handler,), {"timeout": timeout})
    return _werkzeug_server(host, port, app, threaded=True, request_handler=handler)


def _num(v: float) -> float | None:
    return v if v is not None and math.isfinite(v) else None


def _fmt(v, spec: str = ".3f") -> str:
    """A number for the page ('-' when unknown)."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return format(v, spec)
