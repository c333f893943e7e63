"""An image file's width and height from its header (PNG, JPEG, GIF, BMP, WebP), without
decoding its pixels; other formats are decoded once with OpenCV."""

from __future__ import annotations

import struct
from pathlib import Path

from ..errors import DatasetError

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".gif", ".webp", ".tif", ".tiff")


def image_size(path: str | Path, box=None) -> tuple[int, int]:
    """(width, height) in px of an image file of a dataset, read through the dataset's closed
    Box (formats.boxes.dataset_box; default: a box of the file's own folder): a regular file
    inside the folder, checked again once open. Only the header is read, whatever the file's
    size; a format without a header read here is decoded, up to FOREIGN_MAX_BYTES. DatasetError
    naming the file if it is missing or unreadable."""
    from ..dataset.images import FOREIGN_MAX_BYTES
    from .boxes import dataset_box

    p = Path(path)
    box = dataset_box(p.parent) if box is None else box
    try:
        with box.open(p.relative_to(box.root).as_posix(), None, where=str(p)) as f:
            head = f.read(32)
            size = _from_header(head, f)
            if size is None:  # decoded whole: read again from its start
                f.seek(0)
                data = f.read(FOREIGN_MAX_BYTES + 1)
                if len(data) > FOREIGN_MAX_BYTES:
                    raise DatasetError(f"an image without a PNG, JPEG, GIF, BMP or WebP header is decoded whole, "
                                       f"and this one is larger than {FOREIGN_MAX_BYTES >> 20} MiB", where=str(p))
    except OSError as exc:
        raise DatasetError(f"cannot read the image: {exc.strerror or exc}", where=str(p)) from None
    if size is None:
        import cv2
        import numpy as np

        img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_UNCHANGED) if data else None
        if img is None:
            raise DatasetError("not an image file OpenCV can read", where=str(p))
        size = (img.shape[1], img.shape[0])
    if size[0] <= 0 or size[1] <= 0:
        raise DatasetError(f"the image header gives a size of {size[0]} x {size[1]}", where=str(p))
    return size


def _from_header(head: bytes, f) -> tuple[int, int] | None:
    # PNG: signature, then the IHDR chunk with width and height (PNG spec, section 11.2.2)
    if head[:8] == b"\x89PNG\r\n\x1a\n" and head[12:16] == b"IHDR":
        return struct.unpack(">II", head[16:24])
    # GIF: logical screen width and height, little-endian (GIF89a spec, section 18)
    if head[:6] in (b"GIF87a", b"GIF89a"):
        return struct.unpack("<HH", head[6:10])
    # BMP: BITMAPINFOHEADER width and height (height negative for top-down rows); from memory
    if head[:2] == b"BM" and len(head) >= 26:
        w, h = struct.unpack("<ii", head[18:26])
        return w, abs(h)
    # WebP: RIFF container with a VP8 / VP8L / VP8X chunk (WebP container spec)
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return _webp(head + f.read(32))
    # JPEG: walk the markers to the first start-of-frame (ITU T.81, section B.2.2)
    if head[:2] == b"\xff\xd8":
        f.seek(2)
        return _jpeg(f)
    return None


def _webp(b: bytes) -> tuple[int, int] | None:
    chunk = b[12:16]
    if chunk == b"VP8 " and len(b) >= 30:
        w, h = struct.unpack("<HH", b[26:30])
        return w & 0x3FFF, h & 0x3FFF
    if chunk == b"VP8L" and len(b) >= 25:
        bits = int.from_bytes(b[21:25], "little")
        return (bits & 0x3FFF) + 1, ((bits >> 14) & 0x3FFF) + 1
    if chunk == b"VP8X" and len(b) >= 30:
        return int.from_bytes(b[24:27], "little") + 1, int.from_bytes(b[27:30], "little") + 1
    return None


_SOF = {0xC0, 0xC1, 0xC2, 0xC3, 0xC5, 0xC6, 0xC7, 0xC9, 0xCA, 0xCB, 0xCD, 0xCE, 0xCF}


def _jpeg(f) -> tuple[int, int] | None:
    while True:
        b = f.read(1)
        while b and b != b"\xff":
            b = f.read(1)
        while b == b"\xff":
            b = f.read(1)  # fill bytes
        if not b:
            return None
        marker = b[0]
        if marker in (0x01, *range(0xD0, 0xDA)):
            continue  # markers without a length
        seg = f.read(2)
        if len(seg) < 2:
            return None
        length = struct.unpack(">H", seg)[0]
        if marker in _SOF:
            data = f.read(5)
            if len(data) < 5:
                return None
            h, w = struct.unpack(">HH", data[1:5])
            return w, h
        f.seek(length - 2, 1)
