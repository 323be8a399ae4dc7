"""The frame loader: discovery, capture times, decoding and every kind of bad file."""

import os
import struct
import zlib
from datetime import datetime
from pathlib import Path

import cv2
import numpy as np
import pytest
from PIL import Image
from skimage import data

from inspector.errors import FrameError
from inspector.storage.frames import (
    FrameFile,
    capture_time,
    discover,
    read_frame,
    time_from_name,
    working_size,
)

READ = {"long_side": 160, "max_pixels": 10**8, "time_formats": ("%Y%m%d_%H%M%S",)}


def _ff(path: Path) -> FrameFile:
    return FrameFile(path, path.name, "cam")


def test_discovery_by_content_skipping_partials_hidden_and_outside_links(tmp_path):
    src = tmp_path / "src"
    (src / "dock").mkdir(parents=True)
    img = data.astronaut()
    cv2.imwrite(str(src / "dock" / "a.jpg"), img)
    (src / "dock" / "b").write_bytes(cv2.imencode(".png", img)[1].tobytes())  # no extension
    (src / "dock" / "c.jpg.part").write_bytes(b"\xff\xd8\xff")
    (src / "dock" / ".hidden.jpg").write_bytes(b"\xff\xd8\xff")
    (src / "dock" / "notes.txt").write_text("hello")
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    cv2.imwrite(str(outside / "x.png"), img)
    (src / "dock" / "link.png").symlink_to(outside / "x.png")
    (src / "dock" / "linkdir").symlink_to(outside)
    (src / "dock" / "same.jpg").symlink_to(src / "dock" / "a.jpg")  # a link kept inside
    (src / "yard").symlink_to(src / "dock")  # a camera folder linked to another inside
    files, skips = discover(src)
    assert [f.rel for f in files] == ["dock/a.jpg", "dock/b", "dock/same.jpg"]
    reasons = {s.rel: s.reason for s in skips}
    assert reasons["dock/notes.txt"].startswith("not an image")
    assert "outside" in reasons["dock/link.png"]
    assert not any("linkdir" in r for r in reasons)


def test_capture_time_from_name_then_exif_then_mtime(tmp_path):
    assert time_from_name("dock_20261130_221505.jpg", ["%Y%m%d_%H%M%S"]) == \
        datetime(2026, 11, 30, 22, 15, 5)
    p = tmp_path / "noname.jpg"
    exif = Image.Exif()
    exif.get_ifd(0x8769)[36867] = "2025:06:01 12:34:56"  # EXIF DateTimeOriginal (EXIF 2.3 spec)
    Image.fromarray(data.astronaut()).save(p, exif=exif)
    assert capture_time(p, ["%Y%m%d_%H%M%S"]) == datetime(2025, 6, 1, 12, 34, 56)
    q = tmp_path / "plain.png"
    Image.fromarray(data.astronaut()).save(q)
    os.utime(q, (1_700_000_000, 1_700_000_000))
    assert capture_time(q, []) == datetime.fromtimestamp(1_700_000_000)


def test_reduced_jpeg_decode_matches_full_decode_and_resize(tmp_path):
    big = cv2.resize(data.astronaut(), (1920, 1080))
    p = tmp_path / "big_20261130_120000.jpg"
    cv2.imwrite(str(p), big[..., ::-1], [cv2.IMWRITE_JPEG_QUALITY, 95])
    frame = read_frame(_ff(p), **READ)
    assert frame.image.shape == (90, 160, 3) and frame.image.dtype == np.uint8
    assert frame.source_size == (1920, 1080)
    assert frame.time == datetime(2026, 11, 30, 12, 0, 0)
    ref = cv2.resize(big, (160, 90), interpolation=cv2.INTER_AREA)
    # DCT-domain downscaling vs pixel-domain resize: close, not identical.
    assert np.abs(frame.image.astype(int) - ref).mean() < 4


@pytest.mark.parametrize("name,content,reason", [
    ("empty.jpg", b"", "empty file"),
    ("text.jpg", b"hello world, not a picture", "not an image"),
    ("header.jpg", b"\xff\xd8\xff\xe0" + b"\x00" * 40, "unreadable JPEG header"),
])
def test_bad_files_raise_frame_errors_with_reasons(tmp_path, name, content, reason):
    p = tmp_path / name
    p.write_bytes(content)
    with pytest.raises(FrameError, match=reason):
        read_frame(_ff(p), **READ)


def test_truncated_and_oversized_frames(tmp_path):
    buf = cv2.imencode(".jpg", data.astronaut())[1].tobytes()
    p = tmp_path / "cut.jpg"
    p.write_bytes(buf[: len(buf) // 2])
    with pytest.raises(FrameError, match="truncated"):
        read_frame(_ff(p), **READ)
    # A decompression bomb: a tiny PNG file whose header claims 60000 x 60000 pixels
    # (chunk layout from the PNG specification, ISO/IEC 15948).
    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(
            ">I", zlib.crc32(kind + body))

    ihdr = struct.pack(">IIBBBBB", 60000, 60000, 8, 0, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 1000)
    q = tmp_path / "bomb.png"
    q.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", idat)
                  + chunk(b"IEND", b""))
    with pytest.raises(FrameError, match="too large"):
        read_frame(_ff(q), **{**READ, "max_pixels": 50_000_000})


def test_aspect_ratio_must_match_the_baseline(tmp_path):
    p = tmp_path / "sq.png"
    cv2.imwrite(str(p), data.astronaut())  # 512 x 512
    with pytest.raises(FrameError, match="aspect ratio"):
        read_frame(_ff(p), **READ, size=(160, 90), source_size=(1920, 1080))
    frame = read_frame(_ff(p), **READ, size=(96, 96), source_size=(1024, 1024))
    assert frame.image.shape == (96, 96, 3) and "resized" in frame.notes[0]


def test_working_size_keeps_aspect_with_even_sides():
    assert working_size((1920, 1080), 320) == (320, 180)
    assert working_size((1080, 1920), 320) == (180, 320)
    w, h = working_size((1280, 1024), 320)
    assert (w, h) == (320, 256) and w % 2 == 0 and h % 2 == 0


@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_is_honoured_as_pillow_does(tmp_path, orientation):
    # A picture stored turned or flipped, with the EXIF Orientation tag (0x0112) saying so,
    # as phones and body cameras export them. The upright picture is what Pillow's
    # ImageOps.exif_transpose makes of the same file (the outside reference).
    from PIL import ImageOps

    upright_img = cv2.resize(data.astronaut(), (640, 360))  # upright 640x360
    inverse = {2: Image.Transpose.FLIP_LEFT_RIGHT, 3: Image.Transpose.ROTATE_180,
               4: Image.Transpose.FLIP_TOP_BOTTOM, 5: Image.Transpose.TRANSPOSE,
               6: Image.Transpose.ROTATE_90, 7: Image.Transpose.TRANSVERSE,
               8: Image.Transpose.ROTATE_270}  # stored = inverse of the upright turn
    stored = Image.fromarray(upright_img)
    if orientation in inverse:
        stored = stored.transpose(inverse[orientation])
    exif = Image.Exif()
    exif[0x0112] = orientation
    p = tmp_path / f"cam_{orientation}.jpg"
    stored.save(p, quality=95, exif=exif)
    with Image.open(p) as im:
        want = np.asarray(ImageOps.exif_transpose(im).convert("RGB"))
        assert want.shape == (360, 640, 3) and im.size == stored.size
    # full decode at the upright size, and a reduced (1/2-scale DCT) decode to 320x180
    for size in ((640, 360), (320, 180)):
        frame = read_frame(_ff(p), **READ, size=size, source_size=(640, 360))
        assert frame.source_size == (640, 360) and not frame.notes
        ref = cv2.resize(want, size, interpolation=cv2.INTER_AREA)
        assert frame.image.shape == (size[1], size[0], 3)
        assert np.abs(frame.image.astype(int) - ref).mean() < 4.0


def test_batched_iterator_keeps_input_order_and_runs_the_work_per_batch(tmp_path):
    from inspector.storage.frames import iter_batches

    files = []
    for i in range(7):
        p = tmp_path / f"cam_20261130_1200{i:02d}.png"
        if i == 3:
            p.write_bytes(b"\x89PNG\r\n\x1a\n" + b"\0" * 20)  # a broken one
        else:
            cv2.imwrite(str(p), np.full((18, 32, 3), 30 * i, np.uint8))
        files.append(_ff(p))
    batches = list(iter_batches(files, 3, workers=2, size=(32, 18),
                                work=lambda images: images.mean(axis=(1, 2, 3)), **READ))
    assert [len(b.frames) + len(b.errors) for b in batches] == [3, 3, 1]
    assert [f.file.path.name for b in batches for f in b.frames] == \
        [f.path.name for i, f in enumerate(files) if i != 3]
    assert [f.path.name for b in batches for f, _ in b.errors] == [files[3].path.name]
    # the work's result is per batch, in the order of the batch's frames (grey levels 30 i)
    got = np.concatenate([b.result for b in batches])
    np.testing.assert_allclose(got, [30.0 * i for i in range(7) if i != 3])


def test_frames_decoded_into_their_batch_are_those_read_one_by_one(tmp_path):
    """Decoding each frame into its place in the batch's array (no stacking copy) gives the
    images :func:`read_frame` gives alone, byte for byte, with a broken file and a frame
    given as already decoded (``known``) among them; photographs bundled with
    scikit-image, written as JPEG by OpenCV."""
    from inspector.storage.frames import iter_batches

    files = []
    for i, photo in enumerate([data.astronaut(), data.coffee(), data.chelsea(),
                               data.rocket(), data.astronaut()[::-1]]):
        p = tmp_path / f"cam_20261130_1200{i:02d}.jpg"
        if i == 2:
            p.write_bytes(b"\xff\xd8\xff" + b"\0" * 40)  # a broken one
        else:
            cv2.imwrite(str(p), cv2.resize(photo, (320, 180))[..., ::-1])
        files.append(_ff(p))
    size = (160, 90)
    alone = {f.path.name: read_frame(f, size=size, **READ).image
             for i, f in enumerate(files) if i != 2}
    known = {id(files[3]): read_frame(files[3], size=size, **READ)}
    batches = list(iter_batches(files, 3, workers=2, size=size, known=known,
                                work=lambda images: images.copy(), **READ))
    for b in batches:
        assert b.stacked is not None and b.images is b.stacked
        assert [f.image.base is not None and np.shares_memory(f.image, b.stacked)
                for f in b.frames] == [f.file is not files[3] for f in b.frames]
        np.testing.assert_array_equal(b.result,
                                      np.stack([alone[f.file.path.name] for f in b.frames]))
    assert sum(len(b.frames) for b in batches) == 4 and not known
    # the same frame read into a given array is that array
    out = np.empty((90, 160, 3), np.uint8)
    frame = read_frame(files[0], size=size, out=out, **READ)
    assert frame.image is out
    np.testing.assert_array_equal(out, alone[files[0].path.name])


def test_learn_counts_each_frame_note_once(tmp_path, small_config):
    # Two of twelve normal frames exported at twice the size (same aspect, resized): the
    # learn warning counts two, though every frame is also in the conditions sample.
    from conftest import noisy_copies, write_frames

    from inspector.config import load_config
    from inspector.jobs.learn import learn_camera
    from inspector.storage.frames import discover
    from inspector.storage.store import Store

    rng = np.random.default_rng(1)
    base = rng.integers(40, 200, (64, 96, 3)).astype(np.float32)
    frames = list(noisy_copies(base, 12, rng))
    frames[3] = cv2.resize(frames[3], (192, 128))
    frames[7] = cv2.resize(frames[7], (192, 128))
    write_frames(tmp_path / "normal", frames)
    files, _ = discover(tmp_path / "normal", camera="cam")
    report = learn_camera(files, load_config(small_config).camera("cam"), Store(tmp_path / "s"))
    assert [w for w in report.warnings if "resized" in w][0].startswith("2 frames: ")


def test_reading_ahead_gives_the_same_batches_and_records(tmp_path):
    # A source read with its first batch decoded ahead (FileSource.prefetch, then the rest
    # read on) against one read plainly: the same positions, pixels, skipped frames (a file
    # that is not a JPEG) and notes (a frame exported at twice the size), in order.
    from conftest import noisy_copies, write_frames

    from inspector.jobs.learn import FileSource
    from inspector.storage.frames import discover

    rng = np.random.default_rng(2)
    frames = list(noisy_copies(rng.integers(40, 200, (32, 48, 3)).astype(np.float32), 10, rng))
    frames[6] = cv2.resize(frames[6], (96, 64))
    write_frames(tmp_path / "f", frames)
    files, _ = discover(tmp_path / "f", camera="cam")
    files = sorted(files, key=lambda f: f.path.name)
    files[2].path.write_bytes(b"not a jpeg")
    args = {"long_side": 48, "max_pixels": 10**8, "time_formats": []}
    got = []
    # also: a sample (the resized frame, the broken file, two more) decoded before by a
    # copy that keeps its frames for the source, whose pass takes them (none left)
    for ahead, kept in ((False, False), (True, False), (False, True), (True, True)):
        source = FileSource(files, np.zeros(len(files), int), (48, 32), (48, 32), args, "cam")
        if ahead:
            source.prefetch(range(len(files)), 3, ahead=1)
        if kept:
            sample = list(source.spawn(keep=True).batches([2, 5, 6, 9], 2))
            assert [i.tolist() for i, _ in sample] == [[5], [6, 9]] and len(source._decoded) == 3
        read = [(i.tolist(), b) for i, b in source.batches(range(len(files)), 3)]
        assert not source._decoded
        got.append((read, source.skipped, source.notes))
    plain, skipped, notes = got[0]
    assert [i for i, _ in plain] == [[0, 1], [3, 4, 5], [6, 7, 8], [9]]
    assert list(skipped) == [2] and sum(notes.values()) == 1
    for early, skipped_early, notes_early in got[1:]:
        assert [i for i, _ in plain] == [i for i, _ in early]
        assert all(np.array_equal(a, b) for (_, a), (_, b) in zip(plain, early))
        assert skipped == skipped_early and notes == notes_early
