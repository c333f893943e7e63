"""PNG files written straight from pixels, as the PNG specification lays them out (W3C PNG,
second edition, 2003 = ISO/IEC 15948): the signature, an IHDR chunk, one IDAT chunk holding
the zlib stream of the filtered scanlines, and IEND; each chunk is length, type, data and
the CRC-32 of type and data.

Every scanline takes filter type 2, "Up" (each byte minus the byte above it, modulo 256; the
first line's "above" is zero). The filtered lines are deflated (RFC 1950/1951) by one of two
libraries at one of its levels:
- "isal": Intel's ISA-L (the isal package), levels 0-2, default 2;
- "zlib": Python's zlib, levels 0-9, default 1.
Measured per background kind (tests/bench/bench_scenes.py, PNG settings, 96x96 RGB), ISA-L
encodes in 0.25-0.55x zlib's time and its files decode as fast or faster; on flat and
photograph-like backgrounds its files are also smaller (0.89x, 0.95x), on noise backgrounds
larger (1.1x pink, 1.5x Gaussian, 1.8x uniform noise). So the default follows the background
(`default_deflate`): zlib on noise, where it stores the fewest bytes, ISA-L elsewhere, where it
wins on both counts. Either stays at or below the size of OpenCV's default PNG on its kinds.

There is no colour swap and no library set-up per image. Pixels are PNG's, so any decoder
reads them back exactly (tests compare with OpenCV and Pillow); the bytes themselves belong to
this writer and to the deflate library and version it runs on (manifest.versions records
both, and dask workers must match the driver).
"""

from __future__ import annotations

import struct
import zlib
from dataclasses import dataclass
from functools import lru_cache
from typing import Callable

import numpy as np
from isal import isal_zlib

SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the first 8 bytes of every PNG file (section 5.2)
_COLOUR_TYPE = {1: 0, 2: 4, 3: 2, 4: 6}  # channels -> grey, grey + alpha, RGB, RGBA (section 11.2.2)
_UP = 2  # filter type "Up" (section 9.2)


_U32 = struct.Struct(">I").pack  # a chunk's length and CRC: 4-byte big-endian (section 5.3)


def _chunk(kind: bytes, data: bytes) -> bytes:
    # ISA-L's CRC-32 is the same function as zlib's (ISO 3309, the one PNG names; a test
    # compares them) at 0.15x its time on 15 kB here, as it uses the CPU's carry-less multiply
    return _U32(len(data)) + kind + data + _U32(isal_zlib.crc32(data, isal_zlib.crc32(kind)))


_IEND = _chunk(b"IEND", b"")


@lru_cache(maxsize=64)
def _head(w: int, h: int, c: int) -> bytes:
    """The signature and IHDR chunk of a w x h image of c channels: depth 8, deflate, adaptive
    filtering, no interlace. The same for every image of a dataset, so made once."""
    return SIGNATURE + _chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, _COLOUR_TYPE[c], 0, 0, 0))


@dataclass(frozen=True)
class Deflate:
    """A deflate library: compress(data, level) -> a zlib stream; its levels and default."""

    compress: Callable
    levels: range
    default: int


# ISA-L chooses its code by the CPU's instructions. Its levels 0-2 gave the same bytes with only
# SSE4.2, with AVX2 and with AVX-512 (run under qemu-x86_64 -cpu Nehalem and -cpu Haswell, and on
# this project's AVX-512 machine, 2026-12-02); its level 3 did not, so it is not offered.
DEFLATES = {"isal": Deflate(isal_zlib.compress, range(0, 3), 2), "zlib": Deflate(zlib.compress, range(0, 10), 1)}
DEFLATE = "isal"  # where no background decides (exports of images a dataset re-renders)
NOISE_BACKGROUNDS = ("uniform_noise", "gaussian_noise", "pink_noise")  # spec background kinds


def default_deflate(background_kind: str) -> str:
    """The library a dataset's PNGs take unless told otherwise (see the module docstring)."""
    return "zlib" if background_kind in NOISE_BACKGROUNDS else "isal"


def png_setting(deflate: str | None, level: int | None, background_kind: str) -> tuple[str, int]:
    """(library, level) with what was left unset (None) filled in: the background's library,
    that library's default level. Checking the values is the caller's (it knows where they
    came from)."""
    if deflate is None:
        deflate = default_deflate(background_kind)
    return deflate, DEFLATES[deflate].default if level is None else level


def encode_png(image: np.ndarray, level: int | None = None, deflate: str = DEFLATE) -> bytes:
    """(H, W) or (H, W, C) uint8 pixels, C = 1 grey, 2 grey + alpha, 3 RGB or 4 RGBA (in that
    order, not OpenCV's BGR) -> the bytes of an 8-bit PNG file, deflated by `deflate` at
    `level` (None: that library's default)."""
    engine = DEFLATES[deflate]
    if level is None:
        level = engine.default
    if level not in engine.levels:
        raise ValueError(f"a PNG deflated by {deflate} takes a level in {engine.levels[0]}..{engine.levels[-1]}, got {level}")
    if image.dtype != np.uint8 or image.ndim not in (2, 3) or (image.ndim == 3 and image.shape[2] not in _COLOUR_TYPE):
        raise ValueError(f"a PNG is written from uint8 (H, W) or (H, W, 1-4) pixels, got {image.dtype} {image.shape}")
    h, w = image.shape[:2]
    c = image.shape[2] if image.ndim == 3 else 1
    if not (0 < h < 2**31 and 0 < w < 2**31):
        raise ValueError(f"a PNG is 1 to 2**31 - 1 pixels each way, got {w}x{h}")
    lines = np.ascontiguousarray(image).reshape(h, w * c)
    filtered = np.empty((h, 1 + w * c), np.uint8)
    filtered[:, 0] = _UP
    filtered[0, 1:] = lines[0]
    np.subtract(lines[1:], lines[:-1], out=filtered[1:, 1:])  # uint8: modulo 256, as the filter is defined
    return _head(w, h, c) + _chunk(b"IDAT", engine.compress(filtered, level)) + _IEND
