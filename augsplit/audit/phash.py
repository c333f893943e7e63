"""Image content fingerprints: a 64-bit DCT perceptual hash and an exact content hash.

The perceptual hash reproduces `imagehash.phash` bit for bit: grey by Pillow's integer
luma formula, a 32x32 Lanczos resize with Pillow's fixed-point two-pass arithmetic (as
matrices, so a batch of equal-sized images is two matrix products), then the same
scipy DCT-II, the 8x8 low-frequency block and its median. Bit 63 is the block's (0, 0).
Pass order follows Pillow 13 (Resample.c); Pillow releases that always ran the horizontal
pass first make imagehash differ by a few bits on images more than about twice as tall as wide (the passes' uint8 rounding differs).
On a flat background with a small object most low-frequency coefficients are near zero and
their median comparison is unstable: such images can hash close though they differ.
"""

from __future__ import annotations

import hashlib
from functools import lru_cache

import cv2
import numpy as np
import scipy.fftpack

HASH_SIZE = 8
_SIDE = HASH_SIZE * 4  # imagehash's img_size = hash_size * highfreq_factor
_PRECISION_BITS = 32 - 8 - 2  # Pillow Resample.c, 8-bit channels
_LANCZOS_SUPPORT = 3.0


def luma(rgb: np.ndarray) -> np.ndarray:
    """(..., C) uint8 colour pixels, C = 3 or 4 -> grey uint8, as Pillow's convert('L').

    Pillow (Convert.c) uses L = (19595 R + 38470 G + 7471 B + 0x8000) >> 16, i.e. ITU-R
    BT.601 weights 0.299/0.587/0.114 in 16-bit fixed point; alpha is ignored.
    """
    a = np.asarray(rgb)
    if a.dtype != np.uint8:
        raise ValueError(f"images must be uint8, got {a.dtype}")
    if a.shape[-1] == 1:
        return a[..., 0]
    if a.shape[-1] not in (3, 4):
        raise ValueError(f"expected 1, 3 or 4 channels, got {a.shape[-1]}")
    # One float32 matrix product: every product and partial sum is an integer below 2^24
    # (255 x 65536 + 0x8000 < 2^24), so float32 holds it exactly; /65536 is exact too.
    # cv2.transform is a fast per-pixel dot product (numpy's matmul with 3 columns is not).
    w = np.array([[19595.0, 38470.0, 7471.0]], dtype=np.float32)
    flat = cv2.transform(a.reshape(-1, 1, a.shape[-1])[:, :, :3].astype(np.float32), w).reshape(-1)
    return np.floor((flat + np.float32(0x8000)) / np.float32(65536.0)).astype(np.uint8).reshape(a.shape[:-1])


def _lanczos(x: np.ndarray) -> np.ndarray:
    """Pillow's truncated sinc: sinc(x) sinc(x/3) on [-3, 3)."""
    def sinc(v):
        out = np.ones_like(v)
        nz = v != 0.0
        pv = v[nz] * np.pi
        out[nz] = np.sin(pv) / pv
        return out
    return np.where((x >= -3.0) & (x < 3.0), sinc(x) * sinc(x / 3.0), 0.0)


@lru_cache(maxsize=32)
def resample_matrix(in_size: int, out_size: int) -> np.ndarray:
    """(out, in) integer weights of Pillow's Lanczos resample along one axis (fixed point).

    Follows precompute_coeffs / normalize_coeffs_8bpc in Pillow's Resample.c: window
    centred at (i + 0.5) * scale, support widened by the scale when shrinking, weights
    normalised to sum 1, then rounded half away from zero to 22 fractional bits.
    """
    scale = in_size / out_size
    filterscale = max(scale, 1.0)
    support = _LANCZOS_SUPPORT * filterscale
    ss = 1.0 / filterscale  # Pillow multiplies by the reciprocal; dividing differs in the last ulp
    w = np.zeros((out_size, in_size), dtype=np.float64)
    for i in range(out_size):
        center = (i + 0.5) * scale
        xmin = max(int(center - support + 0.5), 0)
        xmax = min(int(center + support + 0.5), in_size)
        xs = np.arange(xmin, xmax)
        k = _lanczos((xs - center + 0.5) * ss)
        s = 0.0
        for v in k.tolist():  # sequential, as the C loop adds (numpy's pairwise sum rounds differently)
            s += v
        if s != 0.0:
            k = k / s
        w[i, xmin:xmax] = k
    scaled = w * (1 << _PRECISION_BITS)
    fixed = np.where(scaled < 0, np.trunc(scaled - 0.5), np.trunc(scaled + 0.5))
    fixed[w == 0.0] = 0.0
    return fixed


def _resample_pass(img: np.ndarray, mat: np.ndarray) -> np.ndarray:
    # img (N, A, B) float of integers, resampled along the last axis. Integer products
    # summed in float64 stay exact (< 2^53), so this equals Pillow's int32 accumulation.
    acc = img @ mat.T + float(1 << (_PRECISION_BITS - 1))
    return np.clip(np.floor(acc / float(1 << _PRECISION_BITS)), 0, 255)


def resize_grey(grey: np.ndarray, side: int = _SIDE) -> np.ndarray:
    """(N, H, W) uint8 -> (N, side, side) float64 holding Pillow's LANCZOS resize values."""
    g = np.asarray(grey, dtype=np.float64)
    n, h, w = g.shape
    # Pillow 13 (Resample.c) runs the vertical pass first when the height shrinks by
    # more than twice as many pixels as the width; each pass rounds to uint8, so the order
    # matters for the last bit. Older Pillow always went horizontal first (see module doc).
    horizontal_first = not ((h - side) > 0 and (h - side) > (w - side) * 2)
    for axis in ("x", "y") if horizontal_first else ("y", "x"):
        if axis == "x" and w != side:
            g = _resample_pass(g, resample_matrix(w, side))
        elif axis == "y" and h != side:
            g = np.swapaxes(_resample_pass(np.swapaxes(g, 1, 2), resample_matrix(h, side)), 1, 2)
    return g


def phash_batch(images: np.ndarray, chunk: int = 256) -> np.ndarray:
    """Perceptual hashes of equal-sized images, (N, H, W) grey or (N, H, W, C) RGB(A) uint8.

    Returns uint64, most significant bit = DCT coefficient (0, 0), row-major like
    `str(imagehash.phash(img))` read as a hexadecimal number. Works `chunk` images at a
    time so temporaries stay small (float copies are 8x the uint8 input).
    """
    a = np.asarray(images)
    if a.dtype != np.uint8:
        raise ValueError(f"images must be uint8, got {a.dtype}")
    if a.ndim not in (3, 4):
        raise ValueError(f"expected (N, H, W) or (N, H, W, C) images, got shape {a.shape}")
    out = np.zeros(len(a), dtype=np.uint64)
    for s in range(0, len(a), chunk):
        part = a[s : s + chunk]
        grey = luma(part) if part.ndim == 4 else part
        px = resize_grey(grey)
        dct = scipy.fftpack.dct(scipy.fftpack.dct(px, axis=1), axis=2)
        low = dct[:, :HASH_SIZE, :HASH_SIZE].reshape(len(part), -1)
        out[s : s + chunk] = pack_bits(low > np.median(low, axis=1, keepdims=True))
    return out


def phash(image: np.ndarray) -> int:
    """Perceptual hash of one image (H, W) or (H, W, C) uint8, as a Python int."""
    a = np.asarray(image)
    if a.ndim == 3:
        a = luma(a)
    return int(phash_batch(a[None])[0])


def pack_bits(bits: np.ndarray) -> np.ndarray:
    """(N, 64) bool, first bit most significant -> (N,) uint64."""
    b = np.asarray(bits, dtype=bool).reshape(-1, 64)
    return np.packbits(b, axis=1, bitorder="big").view(">u8").astype(np.uint64).ravel()


def fingerprint_images(images, batch: int = 256) -> tuple[np.ndarray, list[str]]:
    """Perceptual hash and content hash of each image of an iterable (any sizes, in order).

    Images of one shape are hashed together in batches, so memory stays at `batch` images.
    """
    n = 0
    sha: list[str] = []
    pending: dict[tuple, list[tuple[int, np.ndarray]]] = {}
    result: dict[int, int] = {}
    for img in images:
        a = np.asarray(img)
        sha.append(content_hash(a))
        g = luma(a) if a.ndim == 3 else a
        pending.setdefault(g.shape, []).append((n, g))
        n += 1
        if len(pending[g.shape]) >= batch:
            _flush(pending.pop(g.shape), result)
    for group in pending.values():
        _flush(group, result)
    return np.array([result[i] for i in range(n)], dtype=np.uint64), sha


def _flush(group, result) -> None:
    hashes = phash_batch(np.stack([g for _, g in group]))
    result.update(zip((i for i, _ in group), hashes.tolist()))


def content_hash(image: np.ndarray) -> str:
    """SHA-256 hex of the raw pixel array (H x W x C uint8, C-order), the manifest's `sha256`."""
    return hashlib.sha256(np.ascontiguousarray(image).tobytes()).hexdigest()


def hex_to_uint64(values) -> np.ndarray:
    """16-digit hexadecimal strings (as `str(imagehash.phash(...))`) -> uint64."""
    return np.array([int(v, 16) for v in values], dtype=np.uint64)


def uint64_to_hex(values) -> list[str]:
    return [f"{int(v):016x}" for v in np.asarray(values, dtype=np.uint64)]
