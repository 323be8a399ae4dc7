"""The review page: a small Flask app over a results folder and the baseline store.

Safety: files are served only from the results folder and the store (anything else, and
every traversal attempt, is a 404); a frame is served only as the frame of a listed item;
label writes need the per-run token embedded in the page (else 403); malformed requests
get a 400 with a one-line reason, never a traceback; the Host header must name this
machine when bound to a loopback address (guards against DNS rebinding).
"""

from __future__ import annotations

import math
import secrets
import sys
import threading
from pathlib import Path

import cv2
import numpy as np
from flask import Flask, Response, abort, jsonify, render_template, request, send_file
from markupsafe import Markup
from werkzeug.exceptions import HTTPException
from werkzeug.security import safe_join

from inspector.config import Config
from inspector.core.baseline import Baseline
from inspector.errors import FrameError, UsageError
from inspector.review.data import Item, Results, parse_filters, select, timeline_svg
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
from inspector.storage.store import Store

#: The longest note kept with a label.
MAX_NOTE = 2000
LOOPBACK_NAMES = {"127.0.0.1", "localhost", "::1", "[::1]"}
_MIME = {"jpeg": "image/jpeg", "png": "image/png", "bmp": "image/bmp", "tiff": "image/tiff"}


class Pictures:
    """Frames, overlays and expected images of items, computed from the stored baselines."""

    def __init__(self, store: Store, config: Config):
        self.store = store
        self.config = config
        self._cache: dict[tuple[str, str], Baseline] = {}
        self._lock = threading.Lock()

    def baseline(self, camera: str, version: str) -> Baseline:
        """The item's baseline version (the active one if the version is unknown)."""
        with self._lock:
            key = (camera, version)
            if key not in self._cache:
                try:
                    known = version in self.store.versions(camera)
                except Exception:
                    raise LookupError(f"no baseline for camera {camera}") from None
                self._cache[key] = self.store.load(camera, version if known else None)
            return self._cache[key]

    def model_kind(self, item: Item) -> str:
        try:
            return self.baseline(item.camera, item.version).model.kind
        except (LookupError, OSError, ValueError):
            return ""

    def decode(self, item: Item) -> tuple[Baseline, np.ndarray]:
        from inspector.jobs.scan import read_args

        b = self.baseline(item.camera, item.version)
        frame = read_frame(FrameFile(item.path, item.rel, item.camera), **read_args(b, self.config))
        return b, frame.image

    def expected(self, item: Item) -> bytes:
        b, image = self.decode(item)
        with self._lock:  # one model evaluation at a time on a 2-core machine
            out = b.model.expected(b.prepare(image[None]))[0]  # as the model saw it
        return _encode(out, ".png")

    def overlay(self, item: Item) -> bytes:
        from inspector.storage.overlay import render_overlay
        from inspector.storage.results import iso_time

        b, image = self.decode(item)
        with self._lock:
            s = b.score(image[None])
        threshold = float(s.thresholds[0]) if s.thresholds is not None else b.threshold.value
        caption = (f"{item.camera}  {iso_time(item.time)}  score {float(s.scores[0]):.2f}  "
                   f"threshold {threshold:.2f}")
        ok, buf = cv2.imencode(".jpg", render_overlay(image, s.maps[0], threshold,
                                                      caption), [cv2.IMWRITE_JPEG_QUALITY, 90])
        return buf.tobytes()


def _encode(rgb: np.ndarray, ext: str) -> bytes:
    ok, buf = cv2.imencode(ext, cv2.cvtColor(np.ascontiguousarray(rgb), cv2.COLOR_RGB2BGR))
    if not ok:
        raise ValueError("could not encode image")
    return buf.tobytes()


def inside(root: Path, rel: str) -> Path | None:
    """``root/rel`` if it is an existing file inside ``root`` (links followed), else None."""
    if not rel or "\x00" in rel or "\\" in rel or ".." in rel.split("/"):
        return None  # any '..' is an attempt to climb out, even one that would land inside
    joined = safe_join(str(root), rel)
    if joined is None:
        return None
    try:
        path = Path(joined).resolve()
        base = Path(root).resolve()
    except (OSError, ValueError, RuntimeError):
        return None
    if base not in path.parents or not path.is_file():
        return None
    return path


def create_app(out: Path, store: Store, config: Config, token: str | None = None,
               allowed_hosts: set[str] | None = None, source: Path | None = None) -> Flask:
    """The review web app.

    Parameters
    ----------
    out : Path
        Results folder (flagged.csv, overlays, run.json, events.csv).
    store : Store
        Baselines and the SQLite file with labels and the frame ledger.
    token : str, optional
        Per-run token required on label writes (a fresh random one by default).
    allowed_hosts : set of str, optional
        Host header names accepted; None accepts any (when bound to a public address).
    source : Path, optional
        The scanned folder, instead of the one in ``OUT/run.json``.
    """
    app = Flask(__name__)
    app.config["MAX_CONTENT_LENGTH"] = 64 * 1024
    app.url_map.merge_slashes = False  # "//etc/passwd" must reach the 404, not a redirect
    app.json.sort_keys = False
    token = token or secrets.token_urlsafe(24)
    results = Results(Path(out), source=source, database=store.database)
    pictures = Pictures(store, config)
    compare_cache: dict[tuple[str, str, str], dict] = {}
    app.config.update(REVIEW_TOKEN=token, REVIEW_RESULTS=results)

    def labels_now() -> dict[tuple[str, str], Label]:
        if not store.database.is_file():
            return {}
        conn = connect(store.database)
        try:
            return {(lab.camera, lab.path): lab for lab in read(conn)}
        finally:
            conn.close()

    def item_or_404(item_id: str) -> Item:
        results.refresh()
        item = results.items.get(item_id)
        if item is None:
            abort(404, f"no item {item_id!r}")
        return item

    @app.before_request
    def check_host():
        if allowed_hosts is not None:
            host = (request.host or "").lower()
            name = host.split("]")[0] + "]" if host.startswith("[") else host.split(":")[0]
            if name not in allowed_hosts:
                abort(400, "unexpected Host header")

    @app.after_request
    def headers(resp: Response) -> Response:
        resp.headers["X-Content-Type-Options"] = "nosniff"
        resp.headers["X-Frame-Options"] = "DENY"
        resp.headers["Referrer-Policy"] = "no-referrer"
        resp.headers["Content-Security-Policy"] = (
            "default-src 'none'; img-src 'self'; style-src 'self'; script-src 'self'; "
            "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'")
        return resp

    @app.errorhandler(HTTPException)
    def http_error(exc: HTTPException):
        text = exc.description if isinstance(exc.description, str) else exc.name
        if request.path.startswith("/api/"):
            return jsonify(error=text), exc.code
        return Response(f"{exc.code} {exc.name}: {text}\n", exc.code, mimetype="text/plain")

    @app.errorhandler(Exception)
    def failure(exc: Exception):
        print(f"review: {request.method} {request.path} failed: {type(exc).__name__}: {exc}",
              file=sys.stderr)
        return Response("500 Internal Server Error\n", 500, mimetype="text/plain")

    @app.get("/")
    def index():
        try:
            f = parse_filters(request.args)
        except ValueError as exc:
            abort(400, str(exc))
        results.refresh()
        labels = labels_now()
        label_of = {k: v.label for k, v in labels.items()}
        items = results.frames if f.view == "frames" else results.listed
        shown = select(items, f, label_of)
        cameras = sorted({i.camera for i in results.listed} | set(store.cameras()))
        counts = []
        for cam in cameras:
            mine = [i for i in items if i.camera == cam]
            labs = [label_of.get((cam, str(i.path)), "") for i in mine]
            counts.append({"camera": cam, "flags": len(mine),
                           "reviewed": sum(bool(x) for x in labs),
                           "incidents": labs.count("incident"),
                           "false_alarms": labs.count("false_alarm")})
        wanted = request.args.get("item", "")
        current = results.items.get(wanted) if wanted else (shown[0] if shown else None)
        if wanted and current is None:
            abort(404, f"no item {wanted!r}")
        link = f"?{f.query()}&item="
        tl_cams = [f.camera] if f.camera else cameras
        events = [i for i in results.listed if i.kind == "event"]
        points = [p for p in results.points
                  if (not f.since or p.time.date() >= f.since)
                  and (not f.until or p.time.date() <= f.until)]
        timelines = [(cam, Markup(timeline_svg(cam, points, events, link,
                                               current.id if current else "")))
                     for cam in tl_cams]
        from inspector.jobs.compare import version_rows

        versions = {}
        for cam in tl_cams:
            try:
                versions[cam] = version_rows(store, cam)
            except UsageError:  # a camera name in the results that cannot be a store folder
                versions[cam] = []
        detail = None
        if current is not None:
            lab = labels.get((current.camera, str(current.path)))
            detail = {"item": current, "label": lab.label if lab else "",
                      "note": lab.note if lab else "", "kind": pictures.model_kind(current)}
        return render_template(
            "index.html", f=f, shown=shown, counts=counts, cameras=cameras, current=current,
            detail=detail, label_of=label_of, timelines=timelines, versions=versions,
            token=token, labels=LABELS, label_text=LABEL_TEXT, link=link, results=results,
            fmt=_fmt)

    @app.get("/favicon.ico")
    def favicon():
        return Response(status=204)

    @app.get("/img/<item_id>/<kind>")
    def image(item_id: str, kind: str):
        item = item_or_404(item_id)
        if kind == "frame":
            path = inside(results.source, item.rel)
            if path is None:
                abort(404, "frame not found in the scanned folder")
            with open(path, "rb") as fh:
                mime = _MIME.get(sniff(fh.read(16)) or "", "application/octet-stream")
            return send_file(path, mimetype=mime, max_age=3600)
        if kind == "overlay" and item.overlay is not None:
            rel = item.overlay.relative_to(results.out).as_posix()
            path = inside(results.out, rel)
            if path is not None:
                return send_file(path, mimetype="image/jpeg", max_age=3600)
        if kind not in ("overlay", "expected"):
            abort(404, f"no picture {kind!r}")
        try:
            data = pictures.expected(item) if kind == "expected" else pictures.overlay(item)
        except FrameError as exc:
            abort(404, f"frame cannot be read: {exc}")
        except (LookupError, OSError, ValueError, KeyError) as exc:
            abort(404, f"no picture: {exc}")
        mime = "image/png" if kind == "expected" else "image/jpeg"
        return Response(data, mimetype=mime, headers={"Cache-Control": "max-age=3600"})

    @app.get("/files/out/<path:rel>")
    def out_file(rel: str):
        path = inside(results.out, rel)
        if path is None:
            abort(404)
        return send_file(path, max_age=60)

    @app.get("/files/store/<path:rel>")
    def store_file(rel: str):
        path = inside(store.root, rel)
        if path is None or path.name.startswith("inspector.sqlite"):
            abort(404)
        return send_file(path, max_age=60)

    @app.post("/api/label")
    def set_label():
        given = request.headers.get("X-Review-Token", "")
        if not given or not secrets.compare_digest(given.encode(), token.encode()):
            abort(403, "missing or wrong review token (reload the page)")
        data = request.get_json(silent=True, force=True)
        if not isinstance(data, dict):
            abort(400, "expected a JSON object")
        item_id, label, note = data.get("item"), data.get("label"), data.get("note", "")
        if not isinstance(item_id, str):
            abort(400, "'item' must be a string")
        if label not in LABELS and label not in (None, ""):
            abort(400, f"'label' must be one of {', '.join(LABELS)} or null to clear")
        if not isinstance(note, str) or len(note) > MAX_NOTE:
            abort(400, f"'note' must be a string of at most {MAX_NOTE} characters")
        item = item_or_404(item_id)
        by_path = {str(f.path): f for f in results.frames}
        conn = connect(store.database)
        try:
            if not label:
                n = remove(conn, item.camera, item.members)
                return jsonify(item=item.id, label=None, frames=n)
            stamp = now()
            rows = []
            for m in item.members:
                fr = by_path.get(m, item if m == str(item.path) else None)
                rel = fr.rel if fr else Path(m).name
                rows.append(Label(
                    camera=item.camera, path=m, rel=rel, event=item.event, label=label,
                    note=note.strip(), score=_num(fr.score) if fr else None,
                    threshold=_num(fr.threshold) if fr else None,
                    version=fr.version if fr else item.version,
                    capture_time=fr.time.isoformat() if fr else "", labelled_at=stamp))
            put(conn, rows)
        finally:
            conn.close()
        return jsonify(item=item.id, label=label, frames=len(rows))

    @app.get("/api/compare")
    def compare():
        from inspector.jobs.compare import COMPARE_FRAMES, compare_versions

        camera, version = request.args.get("camera", ""), request.args.get("version", "")
        try:
            known = camera in store.cameras() and version in store.versions(camera)
        except Exception:
            known = False
        if not known:
            abort(400, "unknown camera or version")
        active = store.active_version(camera)
        key = (camera, active or "", version)
        if key not in compare_cache:
            c = compare_versions(store, config, camera, active, version, COMPARE_FRAMES)
            ch = c.change
            compare_cache[key] = {"camera": camera, "active": active, "version": version,
                                  "text": c.text(), "frames": ch.frames if ch else 0,
                                  "added": ch.added if ch else None,
                                  "removed": ch.removed if ch else None}
        return jsonify(compare_cache[key])

    return app


def _num(v: float) -> float | None:
    return v if v is not None and math.isfinite(v) else None


def _fmt(v, spec: str = ".3f") -> str:
    """A number for the page ('-' when unknown)."""
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return format(v, spec)
