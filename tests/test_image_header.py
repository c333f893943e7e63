"""Image sizes read from header bytes, checked against what OpenCV decodes from the same bytes
(the reference), and huge headers refused before any pixel is decoded."""

from __future__ import annotations

import struct
import zlib

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.errors import SourceError, SpecError
from augsplit.sources.backgrounds import ImageFolder
from augsplit.sources.folder import SpriteFolder, read_image
from augsplit.sources.glyphs import Glyphs
from augsplit.sources.header import image_size
from augsplit.sources.polyomino import Polyominoes

# (suffix, imencode parameters): lossless WebP is VP8L, lossy VP8 (VP8X with alpha)
ENCODINGS = [(".png", []), (".jpg", []), (".bmp", []), (".webp", []), (".webp", [cv2.IMWRITE_WEBP_QUALITY, 80]),
             (".tif", []), (".tiff", [cv2.IMWRITE_TIFF_COMPRESSION, 1])]


def decoded_size(data: bytes) -> tuple[int, int]:
    img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_UNCHANGED)
    return img.shape[1], img.shape[0]


@settings(max_examples=40, deadline=None)
@given(w=st.integers(1, 300), h=st.integers(1, 300), channels=st.sampled_from([1, 3, 4]),
       enc=st.sampled_from(ENCODINGS))
def test_header_size_equals_opencvs_decoded_size(w, h, channels, enc):
    img = np.random.default_rng(w * 1000 + h).integers(0, 256, (h, w, channels), dtype=np.uint8)
    ok, buf = cv2.imencode(enc[0], img[..., 0] if channels == 1 else img, enc[1])
    assert ok
    data = buf.tobytes()
    assert image_size(data) == decoded_size(data) == (w, h)


def test_jpeg_size_found_after_large_metadata_segments():
    ok, buf = cv2.imencode(".jpg", np.zeros((21, 34, 3), np.uint8))
    data = buf.tobytes()
    app = b"\xff\xe1" + struct.pack(">H", 60000) + b"\0" * 59998  # an APP1 (EXIF-sized) segment before SOF
    padded = data[:2] + app + app + data[2:]
    assert image_size(padded) == decoded_size(padded) == (34, 21)


def big_endian_tiff(w: int, h: int) -> bytes:
    """A minimal uncompressed 8-bit grey TIFF in Motorola byte order (TIFF 6.0, section 2)."""
    entries = [(256, 3, 1, w), (257, 3, 1, h), (258, 3, 1, 8), (259, 3, 1, 1), (262, 3, 1, 1),
               (273, 4, 1, 0), (277, 3, 1, 1), (278, 3, 1, h), (279, 4, 1, w * h)]
    ifd_len = 2 + 12 * len(entries) + 4
    pixels_at = 8 + ifd_len
    ifd = struct.pack(">H", len(entries))
    for tag, typ, count, value in entries:
        value = pixels_at if tag == 273 else value
        packed = struct.pack(">HH", value, 0) if typ == 3 else struct.pack(">I", value)
        ifd += struct.pack(">HHI", tag, typ, count) + packed
    ifd += struct.pack(">I", 0)
    return b"MM\0*" + struct.pack(">I", 8) + ifd + bytes(range(256)) * (w * h // 256) + bytes(w * h % 256)


def test_big_endian_tiff():
    data = big_endian_tiff(19, 11)
    assert image_size(data) == decoded_size(data) == (19, 11)


@pytest.mark.parametrize("data", [b"", b"\x89PNG\r\n\x1a\n", b"GIF89a" + bytes(20), b"\xff\xd8\xff\xda\x00\x02",
                                  b"RIFF\0\0\0\0WEBPVP8 " + bytes(20), b"this is not an image"])
def test_unknown_or_cut_headers_give_none(data):
    assert image_size(data) is None


def png_header_only(w: int, h: int) -> bytes:
    """A PNG whose IHDR announces w x h but whose pixel data is a few bytes: what a decoder
    would allocate is decided by the header alone."""
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)
    chunk = lambda kind, body: struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\0" * 64)) + chunk(b"IEND", b"")


def test_huge_sprite_refused_from_its_header(tmp_path):
    # measured on main: a 30000x30000 sprite passed 3 GB before any refusal
    f = tmp_path / "cls" / "huge.png"
    f.parent.mkdir()
    f.write_bytes(png_header_only(30000, 30000))
    with pytest.raises(SourceError, match=r"30000x30000 = 900,000,000 px .*limits.MAX_SPRITE_PIXELS") as e:
        SpriteFolder(tmp_path)
    assert e.value.where == str(f)


def test_sprites_together_are_bounded(tmp_path, monkeypatch):
    monkeypatch.setattr("augsplit.limits.MAX_SOURCE_PIXELS", 250)
    for name in ("a.png", "b.png", "c.png"):
        (tmp_path / "cls").mkdir(exist_ok=True)
        assert cv2.imwrite(str(tmp_path / "cls" / name), np.full((10, 10), 255, np.uint8))
    with pytest.raises(SourceError, match="300 px, above the limit of 250") as e:
        SpriteFolder(tmp_path)
    assert e.value.where.endswith("c.png")


def test_background_images_are_bounded(tmp_path):
    (tmp_path / "bg.png").write_bytes(png_header_only(10000, 10000))
    with pytest.raises(SourceError, match="limits.MAX_BACKGROUND_PIXELS"):
        ImageFolder(tmp_path)


def test_not_a_regular_file_is_refused_without_reading(tmp_path):
    import os

    fifo = tmp_path / "pipe.png"
    os.mkfifo(fifo)  # reading it would block forever
    with pytest.raises(SourceError, match="not a regular file"):
        read_image(fifo)


def test_drawn_sprites_are_bounded_before_drawing():
    with pytest.raises(SpecError, match="limits.MAX_SPRITE_PIXELS") as e:
        Polyominoes(cells=3, cell_px=100_000)
    assert e.value.where == "objects.cell_px"
    with pytest.raises(SpecError, match="limits.MAX_SPRITE_SIDE") as e:
        Glyphs(["A"], height_px=100_000)
    assert e.value.where == "objects.height_px"
    with pytest.raises(SpecError, match="limits.MAX_SPRITE_PIXELS") as e:
        Glyphs(["A" * 2000], height_px=1000)
    assert e.value.where == "objects.texts[0]"
    with pytest.raises(SpecError, match="no larger than height_px") as e:
        Glyphs(["A"], height_px=20, thickness=1_000_000)
    assert e.value.where == "objects.thickness"
