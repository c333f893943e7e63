"""An image's width and height from its header bytes, before anything is decoded.

OpenCV allocates the whole pixel array a header announces before it decodes a byte of it
(up to 2^30 pixels by default), so a small file can claim gigabytes. Reading the size here
first lets the caller refuse such a file by its numbers. Covers the formats augsplit reads:
PNG, JPEG, BMP, WebP and TIFF, identified by their signatures, not by file suffixes.
"""

from __future__ import annotations

import struct

# JPEG start-of-frame markers carry the size; C4 (DHT), C8 (JPG) and CC (DAC) are not frames
# (ITU-T T.81, Table B.1).
_SOF = {0xC0, 0xC1, 0xC2, 0xC3, 0xC5, 0xC6, 0xC7, 0xC9, 0xCA, 0xCB, 0xCD, 0xCE, 0xCF}
_STANDALONE = {0x01, 0xD8} | set(range(0xD0, 0xD8))  # markers without a length field


def image_size(data: bytes) -> tuple[int, int] | None:
    """(width, height) announced by the header of an encoded image, or None if the bytes are
    not one of the formats above or the header is cut short."""
    try:
        if data[:8] == b"\x89PNG\r\n\x1a\n":
            if data[12:16] != b"IHDR":  # PNG spec (ISO/IEC 15948) 5.6: IHDR comes first
                return None
            return struct.unpack(">II", data[16:24])
        if data[:2] == b"\xff\xd8":
            return _jpeg(data)
        if data[:2] == b"BM":
            return _bmp(data)
        if data[:4] == b"RIFF" and data[8:12] == b"WEBP":
            return _webp(data)
        if data[:4] in (b"II*\x00", b"MM\x00*"):
            return _tiff(data)
    except (struct.error, IndexError):
        return None
    return None


def _jpeg(data: bytes) -> tuple[int, int] | None:
    i = 2
    while i + 4 <= len(data):
        if data[i] != 0xFF:
            return None
        marker = data[i + 1]
        if marker == 0xFF:  # fill byte
            i += 1
            continue
        if marker in _STANDALONE:
            i += 2
            continue
        (length,) = struct.unpack(">H", data[i + 2:i + 4])
        if marker in _SOF:
            height, width = struct.unpack(">HH", data[i + 5:i + 9])
            return (width, height) if height else None  # height 0: given later (DNL), rare
        if marker in (0xD9, 0xDA) or length < 2:  # end of image or start of scan before any frame
            return None
        i += 2 + length
    return None


def _bmp(data: bytes) -> tuple[int, int]:
    (header,) = struct.unpack("<I", data[14:18])
    if header == 12:  # BITMAPCOREHEADER: 16-bit unsigned sizes
        return struct.unpack("<HH", data[18:22])
    width, height = struct.unpack("<ii", data[18:26])  # negative height: rows stored top-down
    return abs(width), abs(height)


def _webp(data: bytes) -> tuple[int, int] | None:
    # RIFF container with one VP8 / VP8L / VP8X chunk first (Google's WebP container spec)
    chunk = data[12:16]
    if chunk == b"VP8X":
        w = int.from_bytes(data[24:27], "little") + 1
        h = int.from_bytes(data[27:30], "little") + 1
        return w, h
    if chunk == b"VP8 ":  # RFC 6386 9.1: 3-byte frame tag, start code, then 14-bit sizes
        if data[23:26] != b"\x9d\x01\x2a":
            return None
        w, h = struct.unpack("<HH", data[26:30])
        return w & 0x3FFF, h & 0x3FFF
    if chunk == b"VP8L":  # lossless bitstream: signature 0x2f, then two 14-bit sizes minus one
        if data[20] != 0x2F:
            return None
        (bits,) = struct.unpack("<I", data[21:25])
        return (bits & 0x3FFF) + 1, ((bits >> 14) & 0x3FFF) + 1
    return None


def _tiff(data: bytes) -> tuple[int, int] | None:
    # TIFF 6.0: byte order, 42, offset of the first IFD; tags 256/257 are width/length
    e = "<" if data[:2] == b"II" else ">"
    (ifd,) = struct.unpack(e + "I", data[4:8])
    (n,) = struct.unpack(e + "H", data[ifd:ifd + 2])
    size = {}
    for k in range(n):
        tag, typ, _count = struct.unpack(e + "HHI", data[ifd + 2 + 12 * k:ifd + 10 + 12 * k])
        if tag in (256, 257):
            at = ifd + 10 + 12 * k
            (v,) = struct.unpack(e + ("H" if typ == 3 else "I"), data[at:at + (2 if typ == 3 else 4)])
            size[tag] = v
    return (size[256], size[257]) if len(size) == 2 else None
