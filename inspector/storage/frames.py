"""Reading frames: discovery, capture time and decoding. The one frame loader of the tool.

Learn, scan and watch all go through :func:`discover` (which files are frames of which
camera) and :func:`read_frame` (bytes to a working-resolution RGB array). A file that
cannot become a frame raises :class:`~inspector.errors.FrameError` whose message is the
reason recorded in ``skipped.csv``.
"""

from __future__ import annotations

import io
import os
import re
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import datetime
from functools import lru_cache
from itertools import islice
from pathlib import Path

import cv2
import numpy as np
from PIL import Image

from inspector.config import FrameSettings
from inspector.errors import FrameError
from inspector.names import is_ignored_name

# Corrupt files are reported as skips, not as decoder chatter on stderr.
try:
    cv2.utils.logging.setLogLevel(cv2.utils.logging.LOG_LEVEL_SILENT)
except AttributeError:  # pragma: no cover - older OpenCV
    cv2.setLogLevel(0)

#: Leading bytes of the formats read, by content rather than by file extension.
_SIGNATURES = (
    (b"\xff\xd8\xff", "jpeg"),
    (b"\x89PNG\r\n\x1a\n", "png"),
    (b"BM", "bmp"),
    (b"II*\x00", "tiff"),
    (b"MM\x00*", "tiff"),
)
#: Two aspect ratios closer than this (relative) count as the same.
ASPECT_TOLERANCE = 0.02


@dataclass(frozen=True)
class FrameFile:
    """A file that may hold a frame: where it is and which camera it belongs to."""

    path: Path
    #: Path relative to the scanned folder, forward slashes (the ``frame`` CSV column).
    rel: str
    camera: str


@dataclass
class Frame:
    """A decoded frame at working resolution."""

    file: FrameFile
    #: RGB image, shape (H, W, 3), uint8.
    image: np.ndarray
    time: datetime
    #: (width, height) of the exported frame as stored on disk.
    source_size: tuple[int, int]
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class Skip:
    """A file that was not scored, with the reason.

    ``waiting``: its camera has no usable baseline yet. The ledger keeps such a frame as
    ``waiting`` so that a watch scores it once a baseline is active; a scan (a writer not
    in append mode) also records it in skipped.csv, since nobody will come back to it.
    """

    #: Path relative to the scanned folder (``<camera>/...``), as the ledger and CSVs write it.
    rel: str
    camera: str
    reason: str
    waiting: bool = False


def sniff(head: bytes) -> str | None:
    """The image format from a file's first bytes (``"jpeg"``, ``"png"``, ...), else None."""
    for magic, kind in _SIGNATURES:
        if head.startswith(magic):
            return kind
    return None


def _image_kind(head: bytes) -> str:
    """:func:`sniff` of a file's first bytes; FrameError with the skip reason when the file
    is empty or not an image (the one wording for the listing and the reading alike)."""
    if not head:
        raise FrameError("empty file")
    kind = sniff(head)
    if kind is None:
        raise FrameError("not an image (content is not JPEG, PNG, BMP or TIFF)")
    return kind


def _unreadable(exc: OSError) -> str:
    """The skip reason of a file that could not be opened or read."""
    if isinstance(exc, FileNotFoundError):
        return "file disappeared before it could be read"
    return f"cannot read file: {exc.strerror or exc}"


def discover(source: Path, camera: str | None = None) -> tuple[list[FrameFile], list[Skip]]:
    """List the frame files under ``source``, recursively, in a stable order.

    Parameters
    ----------
    source : Path
        The folder to read. Nothing is written there.
    camera : str, optional
        Every frame belongs to this camera. Without it, a frame's camera is its first
        folder level under ``source``; files directly in ``source`` are skipped.

    Returns
    -------
    files : list of FrameFile
        Files whose content starts like a JPEG, PNG, BMP or TIFF image.
    skips : list of Skip
        Files passed over with the reason (not an image, a link leading outside source, ...).
        Hidden files and partial-download names are ignored without a record.
    """
    root = source.resolve()
    files: list[FrameFile] = []
    skips: list[Skip] = []
    seen_dirs: set[Path] = set()
    for dirpath, dirnames, filenames in os.walk(root, followlinks=True):
        here = Path(dirpath)
        real = here.resolve()
        if real in seen_dirs or not _inside(real, root):
            dirnames[:] = []
            continue
        seen_dirs.add(real)
        dirnames[:] = sorted(d for d in dirnames if not is_ignored_name(d)
                             and _inside((here / d).resolve(), root))
        for name in sorted(filenames):
            found = frame_file(here / name, root, camera, real)
            if isinstance(found, FrameFile):
                files.append(found)
            elif found is not None:
                skips.append(found)
    return files, skips


def frame_file(path: Path, root: Path, camera: str | None = None,
               real_dir: Path | None = None) -> FrameFile | Skip | None:
    """Decide what one file under ``root`` is: a frame file, a skip with its reason, or
    None for names that are ignored (hidden files, downloads still being written).

    Parameters
    ----------
    path : Path
        The file, under ``root`` (not resolved: links are checked here).
    root : Path
        The resolved folder being read.
    camera : str, optional
        As in :func:`discover`.
    real_dir : Path, optional
        The resolved folder holding ``path``, known to be inside ``root`` (as
        :func:`discover` walks): then only a file that is itself a link is resolved to be
        checked (a path resolved component by component costs more than the rest of
        the listing of a frame).
    """
    if is_ignored_name(path.name):
        return None
    rel = path.relative_to(root).as_posix()
    if any(is_ignored_name(part) for part in rel.split("/")[:-1]):
        return None
    cam = camera if camera is not None else (rel.split("/")[0] if "/" in rel else "")
    if not cam:
        return Skip(rel, "", "not inside a camera folder (expected SOURCE/<camera>/...)")
    if (real_dir is None or os.path.islink(path)) and not _inside(path.resolve(), root):
        return Skip(rel, cam, "link leads outside the scanned folder")
    try:
        with open(path, "rb") as fh:
            head = fh.read(16)
    except OSError as exc:
        gone = isinstance(exc, FileNotFoundError) and path.is_symlink()
        return Skip(rel, cam, "link points to nothing" if gone else _unreadable(exc))
    try:
        _image_kind(head)
    except FrameError as exc:
        return Skip(rel, cam, str(exc))
    return FrameFile(path, rel, cam)


def _inside(path: Path, root: Path) -> bool:
    return path == root or root in path.parents


# --- capture time --------------------------------------------------------------------------

_FIELD_RE = {"%Y": r"\d{4}", "%m": r"\d{2}", "%d": r"\d{2}", "%H": r"\d{2}", "%M": r"\d{2}",
             "%S": r"\d{2}", "%f": r"\d{1,6}", "%y": r"\d{2}", "%j": r"\d{3}"}


@lru_cache(maxsize=64)
def _pattern(fmt: str) -> re.Pattern[str]:
    out, i = [], 0
    while i < len(fmt):
        token = fmt[i:i + 2]
        if token in _FIELD_RE:
            out.append(_FIELD_RE[token])
            i += 2
        else:
            out.append(re.escape(fmt[i]))
            i += 1
    return re.compile("(?<!\\d)" + "".join(out) + "(?!\\d)")


def time_from_name(name: str, formats: Iterable[str]) -> datetime | None:
    """The capture time written in a file name, by the first of ``formats`` that matches.

    >>> time_from_name("dock_20261130_221505.jpg", ["%Y%m%d_%H%M%S"])
    datetime.datetime(2026, 11, 30, 22, 15, 5)
    """
    for fmt in formats:
        for match in _pattern(fmt).finditer(name):
            try:
                return datetime.strptime(match.group(0), fmt)
            except ValueError:
                continue
    return None


def time_from_exif(data: bytes) -> datetime | None:
    """EXIF DateTimeOriginal (else DateTime) of an image's bytes, if present and valid."""
    try:
        with Image.open(io.BytesIO(data)) as im:
            exif = im.getexif()
            raw = exif.get_ifd(0x8769).get(36867) or exif.get(306)
    except Exception:  # any broken header: there is simply no EXIF time
        return None
    try:
        return datetime.strptime(str(raw).strip("\x00 "), "%Y:%m:%d %H:%M:%S")
    except (TypeError, ValueError):
        return None


def capture_time(path: Path, formats: Iterable[str], data: bytes | None = None) -> datetime:
    """Capture time: file-name pattern, else EXIF DateTimeOriginal, else modification time."""
    found = time_from_name(path.name, formats)
    if found is None:
        if data is None:
            try:
                with open(path, "rb") as fh:
                    data = fh.read(1 << 16)
            except OSError:
                data = b""
        found = time_from_exif(data)
    if found is None:
        try:
            found = datetime.fromtimestamp(path.stat().st_mtime)
        except OSError:
            found = datetime.now()
    return found


# --- decoding ------------------------------------------------------------------------------

def working_size(source_size: tuple[int, int], long_side: int) -> tuple[int, int]:
    """(width, height) at working resolution: long side ``long_side``, aspect kept, even sides."""
    w, h = source_size
    scale = long_side / max(w, h)
    even = lambda v: max(2, int(round(v * scale / 2.0)) * 2)  # noqa: E731
    return even(w), even(h)


def same_aspect(a: tuple[int, int], b: tuple[int, int]) -> bool:
    ra, rb = a[0] / a[1], b[0] / b[1]
    return abs(ra - rb) <= ASPECT_TOLERANCE * rb


def _reduced_flag(kind: str, source_size: tuple[int, int], size: tuple[int, int]) -> int:
    """OpenCV read mode: JPEGs decode at 1/2, 1/4 or 1/8 scale in the DCT domain when the
    result still covers ``size``; other formats decode in full."""
    if kind == "jpeg":
        for factor, flag in ((8, cv2.IMREAD_REDUCED_COLOR_8), (4, cv2.IMREAD_REDUCED_COLOR_4),
                             (2, cv2.IMREAD_REDUCED_COLOR_2)):
            if source_size[0] // factor >= size[0] and source_size[1] // factor >= size[1]:
                return flag
    return cv2.IMREAD_COLOR


#: EXIF Orientation (tag 0x0112) values whose stored pixels are the upright picture turned
#: by 90 degrees (width and height swapped), and the turn or flip that makes each upright
#: (EXIF 2.3, sec. 4.6.4 A; the same table as Pillow's ``ImageOps.exif_transpose``).
_SWAPPED = (5, 6, 7, 8)
_UPRIGHT = {
    2: lambda a: a[:, ::-1],
    3: lambda a: a[::-1, ::-1],
    4: lambda a: a[::-1],
    5: lambda a: a.swapaxes(0, 1),
    6: lambda a: a.swapaxes(0, 1)[:, ::-1],
    7: lambda a: a.swapaxes(0, 1)[::-1, ::-1],
    8: lambda a: a.swapaxes(0, 1)[::-1],
}


def upright(image: np.ndarray, orientation: int) -> np.ndarray:
    """The picture as meant to be seen: stored pixels turned or flipped by their EXIF
    Orientation tag (1 or unknown: as stored).

    Parameters
    ----------
    image : ndarray, shape (H, W) or (H, W, C)
    orientation : int
        EXIF Orientation, 1..8.

    Returns
    -------
    ndarray, contiguous; shape (W, H, ...) for orientations 5 to 8
    """
    turn = _UPRIGHT.get(int(orientation))
    return image if turn is None else np.ascontiguousarray(turn(image))


def _from_header(source, read):
    """``read(im)`` of an image opened for its header (a path or a binary file object), or
    None when it cannot be opened or read. No pixel is decoded, so no size limit applies
    here: callers apply their own."""
    saved = Image.MAX_IMAGE_PIXELS
    Image.MAX_IMAGE_PIXELS = None  # our own cap, with our own message
    try:
        with Image.open(source) as im:
            return read(im)
    except Exception:
        return None
    finally:
        Image.MAX_IMAGE_PIXELS = saved


def _header_dims(source) -> tuple[tuple[int, int], int] | None:
    """Upright (width, height) and EXIF orientation (1 when absent) from an image header (a
    path or a binary file object), or None when it cannot be read (see
    :func:`_from_header`). A picture stored turned by 90 degrees (orientation 5 to 8, as
    phones and body cameras export them) has width and height swapped."""
    def dims(im) -> tuple[tuple[int, int], int]:
        size = (int(im.size[0]), int(im.size[1]))
        try:
            orientation = int(im.getexif().get(0x0112, 1) or 1)
        except Exception:  # a broken EXIF block: show the pixels as stored
            orientation = 1
        if not 1 <= orientation <= 8:
            orientation = 1
        return (size[::-1] if orientation in _SWAPPED else size), orientation

    return _from_header(source, dims)


def image_size(path: Path) -> tuple[int, int] | None:
    """Upright (width, height) of an image file from its header alone; None when unreadable."""
    found = _header_dims(path)
    return None if found is None else found[0]


def jpeg_compression(path: Path) -> tuple[list[list[int]], int] | None:
    """A JPEG file's quantisation tables (natural order, luminance first) and chroma
    subsampling (0 = 4:4:4, 1 = 4:2:2, 2 = 4:2:0), read from its header (no pixel is
    decoded, see :func:`_from_header`); None for other formats, unreadable files or unusual
    layouts."""
    def compression(im) -> tuple[list[list[int]], int] | None:
        if im.format != "JPEG" or im.mode != "RGB":
            return None
        from PIL import JpegImagePlugin
        tables = [list(map(int, im.quantization[k])) for k in sorted(im.quantization)]
        sampling = JpegImagePlugin.get_sampling(im)
        if not tables or len(tables) > 4 or sampling not in (0, 1, 2):
            return None
        return tables, int(sampling)

    return _from_header(path, compression)


def header_size(data: bytes, max_pixels: int) -> tuple[str, tuple[int, int], int]:
    """Format, upright (width, height) and EXIF orientation from the header alone,
    refusing oversized or truncated files (see :func:`_header_dims` for the orientation).

    Raises
    ------
    FrameError
        Not an image, a header that cannot be read, more than ``max_pixels`` pixels
        (checked before any pixel is decoded), or a JPEG/PNG missing its end marker.
    """
    kind = _image_kind(data[:16])
    found = _header_dims(io.BytesIO(data))
    if found is None:
        raise FrameError(f"unreadable {kind.upper()} header (corrupt or truncated file)")
    size, orientation = found
    if size[0] < 1 or size[1] < 1:
        raise FrameError(f"image has no pixels ({size[0]}x{size[1]})")
    if size[0] * size[1] > max_pixels:
        raise FrameError(f"too large: {size[0]}x{size[1]} = {size[0] * size[1]} pixels "
                         f"exceeds max_pixels = {max_pixels}")
    if kind == "jpeg" and data.rfind(b"\xff\xd9", max(0, len(data) - 4096)) < 0:
        raise FrameError("truncated JPEG (no end-of-image marker)")
    if kind == "png" and b"IEND" not in data[-64:]:
        raise FrameError("truncated PNG (no end chunk)")
    return kind, size, orientation


def read_frame(file: FrameFile, long_side: int, max_pixels: int, time_formats: Iterable[str],
               size: tuple[int, int] | None = None,
               source_size: tuple[int, int] | None = None,
               out: np.ndarray | None = None) -> Frame:
    """Decode one frame to RGB uint8 at working resolution.

    Parameters
    ----------
    file : FrameFile
    long_side : int
        Working long side, used when ``size`` is None.
    max_pixels : int
        Pixel cap, checked on the header before decoding.
    time_formats : iterable of str
        File-name patterns for the capture time.
    size : (int, int), optional
        Exact working (width, height), e.g. the baseline's. A frame of another aspect ratio
        is refused; one of the same aspect but another resolution is resized, with a note.
    source_size : (int, int), optional
        The exported resolution the baseline was learnt from, for that note.
    out : ndarray, shape (H, W, 3), uint8, C-contiguous, optional
        Where to put the image when its working size is that shape (e.g. its place in a
        batch, saving the copy of stacking); ``Frame.image`` is then ``out``.

    Returns
    -------
    Frame
        ``image`` has shape (H, W, 3), dtype uint8, RGB.

    Raises
    ------
    FrameError
        With the skip reason.
    """
    try:
        with open(file.path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        raise FrameError(_unreadable(exc)) from None
    kind, src, orientation = header_size(data, max_pixels)
    notes = []
    if size is None:
        size = working_size(src, long_side)
    elif not same_aspect(src, size):
        ref = source_size or size
        raise FrameError(f"aspect ratio of {src[0]}x{src[1]} differs from the baseline's "
                         f"{ref[0]}x{ref[1]}")
    elif source_size is not None and tuple(src) != tuple(source_size):
        notes.append(f"resolution {src[0]}x{src[1]} differs from the baseline's "
                     f"{source_size[0]}x{source_size[1]}; resized")
    buf = np.frombuffer(data, dtype=np.uint8)
    # Decode the stored pixels (their own orientation), at reduced scale when the stored
    # picture still covers the working size turned the same way, then stand them upright.
    swapped = orientation in _SWAPPED
    stored, want = ((src[1], src[0]), (size[1], size[0])) if swapped else (src, size)
    image = cv2.imdecode(buf, _reduced_flag(kind, stored, want) | cv2.IMREAD_IGNORE_ORIENTATION)
    if image is None or image.size == 0:
        raise FrameError(f"cannot decode {kind.upper()} data (corrupt file)")
    image = upright(image, orientation)
    if image.shape[1] != size[0] or image.shape[0] != size[1]:
        image = cv2.resize(image, size, interpolation=cv2.INTER_AREA)
    if out is not None and out.shape == image.shape:
        image = cv2.cvtColor(image, cv2.COLOR_BGR2RGB, dst=out)
    else:
        image = cv2.cvtColor(image, cv2.COLOR_BGR2RGB)
    when = capture_time(file.path, time_formats, data)
    return Frame(file=file, image=image, time=when, source_size=src, notes=notes)


def read_settings(fs: FrameSettings) -> dict:
    """The arguments of :func:`read_frame` that a camera's ``[frames]`` settings give
    (``long_side``, ``max_pixels``, ``time_formats``); scan adds the baseline's sizes."""
    return {"long_side": fs.long_side, "max_pixels": fs.max_pixels,
            "time_formats": fs.time_formats}


@dataclass
class FrameBatch:
    """Consecutive files decoded together by :func:`iter_batches`.

    Attributes
    ----------
    frames : list of Frame
        The files that decoded, in input order.
    errors : list of (FrameFile, FrameError)
        The files that did not, with the reason.
    result : object
        What the batch's ``work`` returned for the stacked images of ``frames`` (None
        without work or without frames).
    """

    frames: list[Frame]
    errors: list[tuple[FrameFile, FrameError]]
    result: object = None
    #: The images of ``frames`` when they were decoded into one array (:func:`iter_batches`
    #: with a working ``size``), which :attr:`images` then is.
    stacked: np.ndarray | None = field(default=None, repr=False)

    @property
    def images(self) -> np.ndarray:
        """The decoded frames stacked, shape (n, H, W, 3), uint8."""
        if self.stacked is not None:
            return self.stacked
        return np.stack([f.image for f in self.frames])


def iter_batches(files: Iterable[FrameFile], batch_size: int, workers: int = 2,
                 work: Callable[[np.ndarray], object] | None = None,
                 known: dict[int, Frame] | None = None, **read_args) -> Iterator[FrameBatch]:
    """Decode frames in batches, yielding the batches in input order.

    Each batch of up to ``batch_size`` consecutive files is decoded by one worker thread
    (OpenCV, numpy and torch release the GIL), which then runs ``work`` on the batch's
    stacked images (e.g. preparing and scoring them), so the per-frame work of one batch
    overlaps the decoding of the next. At most ``2 * workers`` batches are in flight.
    Keyword arguments go to :func:`read_frame`; every batch has the same working size
    when ``size`` is given.

    Parameters
    ----------
    files : iterable of FrameFile
    batch_size : int
    workers : int
        Threads decoding (and working) at once.
    work : callable, optional
        ``work(images)`` with images of shape (n, H, W, 3), uint8; must not depend on the
        other batches (they run concurrently).
    known : dict, optional
        Frames decoded before with the same ``read_args``, by ``id`` of their file: taken
        from it (removed) instead of decoded again.
    """
    size = read_args.get("size")
    # With a working size every frame of a batch has, each is decoded into its place in one
    # array of the batch: the batch's images with no copy made to stack them.
    shape = None if size is None else (int(size[1]), int(size[0]), 3)

    def one(chunk: list[FrameFile]) -> FrameBatch:
        done = FrameBatch([], [])
        stack = None if shape is None else np.empty((len(chunk),) + shape, np.uint8)
        for f in chunk:
            place = None if stack is None else stack[len(done.frames)]
            frame = known.pop(id(f), None) if known else None
            if frame is None:
                try:
                    frame = read_frame(f, **read_args, out=place)
                except FrameError as exc:
                    done.errors.append((f, exc))
                    continue
            if place is not None and frame.image is not place:
                np.copyto(place, frame.image)  # (decoded before, or another size)
            done.frames.append(frame)
        if stack is not None and done.frames:
            done.stacked = stack[:len(done.frames)]
        if work is not None and done.frames:
            done.result = work(done.images)
        return done

    it = iter(files)

    def chunks() -> Iterator[list[FrameFile]]:
        while chunk := list(islice(it, max(1, batch_size))):
            yield chunk

    source = chunks()
    with ThreadPoolExecutor(max_workers=max(1, workers)) as pool:
        pending = deque(pool.submit(one, c) for c in islice(source, 2 * max(1, workers)))
        while pending:
            batch = pending.popleft().result()
            nxt = next(source, None)
            if nxt is not None:
                pending.append(pool.submit(one, nxt))
            yield batch
