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

from functools import lru_cache

import cv2
import numpy as np
import scipy.fftpack

from ..manifest import pixel_sha256 as content_hash  # the manifest's `sha256`

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


# OpenBLAS multiplies on the calling thread when M*N*K is at most 4 * 65536 (interface/gemm.c,
# GEMM_MULTITHREAD_THRESHOLD); larger products start its threads, which on a busy machine spin
# against the image decoders and made a 640x480 hash several times slower. Products are cut
# into row chunks under this size.
_ONE_THREAD_MNK = 1 << 18


@lru_cache(maxsize=64)
def _bands(in_size: int, out_size: int) -> tuple:
    """Blocks of output columns with the input span their weights touch: (start, stop, lo, hi,
    weights (hi - lo, stop - start)). Small inputs are one dense block; for large reductions
    each block of 8 outputs reads only its window, about 1/5 of the row at 640 -> 32."""
    mat = resample_matrix(in_size, out_size)
    block = out_size if in_size <= 4 * out_size else 8
    out = []
    for s in range(0, out_size, block):
        e = min(s + block, out_size)
        used = np.flatnonzero((mat[s:e] != 0).any(axis=0))
        lo, hi = (int(used[0]), int(used[-1]) + 1) if len(used) else (0, 1)
        out.append((s, e, lo, hi, np.ascontiguousarray(mat[s:e, lo:hi].T)))
    return tuple(out)


def _rows_pass(g: np.ndarray, out_size: int) -> np.ndarray:
    """(M, L) float64 of integers -> (M, out_size): Pillow's Lanczos pass along each row, with
    its fixed-point rounding. Integer products summed in float64 stay exact (< 2^53), so this
    equals Pillow's int32 accumulation; clip to [0, 255] as Pillow's clip8."""
    m, length = g.shape
    acc = np.empty((m, out_size), dtype=np.float64)
    for s, e, lo, hi, w in _bands(length, out_size):
        step = max(1, _ONE_THREAD_MNK // max((hi - lo) * (e - s), 1))
        for r in range(0, m, step):
            np.matmul(g[r : r + step, lo:hi], w, out=acc[r : r + step, s:e])
    acc += float(1 << (_PRECISION_BITS - 1))
    acc *= 1.0 / float(1 << _PRECISION_BITS)  # a power of two: exact
    np.floor(acc, out=acc)
    return np.clip(acc, 0.0, 255.0, out=acc)


def resize_grey(grey: np.ndarray, side: int = _SIDE) -> np.ndarray:
    """(N, H, W) uint8 -> (N, side, side) float64 holding Pillow's LANCZOS resize values."""
    g = np.asarray(grey)
    n, h, w = g.shape
    # Pillow 13 (Resample.c) runs the vertical pass first when the height shrinks by
    # more than twice as many pixels as the width; each pass rounds to uint8, so the order
    # matters for the last bit. Older Pillow always went horizontal first (see module doc).
    # Every pass runs along rows; a vertical pass on transposed images.
    vertical_first = (h - side) > 0 and (h - side) > (w - side) * 2
    if vertical_first:
        t = np.ascontiguousarray(g.transpose(0, 2, 1)).astype(np.float64)  # (N, W, H)
        t = _rows_pass(t.reshape(n * w, h), side).reshape(n, w, side)
        g = np.ascontiguousarray(t.transpose(0, 2, 1))  # (N, side, W)
        if w != side:
            g = _rows_pass(g.reshape(n * side, w), side).reshape(n, side, side)
        return g
    g = g.astype(np.float64)
    if w != side:
        g = _rows_pass(g.reshape(n * h, w), side).reshape(n, h, side)
    if h != side:
        t = np.ascontiguousarray(g.transpose(0, 2, 1))  # (N, side, H), small
        g = _rows_pass(t.reshape(n * side, h), side).reshape(n, side, side).transpose(0, 2, 1)
    return g


def phash_batch(images: np.ndarray, chunk: int = 256, coefficients: bool = False):
    """Perceptual hashes of equal-sized images, (N, H, W) grey or (N, H, W, C) RGB(A) uint8.

    Returns uint64, most significant bit = DCT coefficient (0, 0), row-major like
    `str(imagehash.phash(img))` read as a hexadecimal number; with `coefficients=True` also
    the (N, 8, 8) float32 low-frequency DCT block the bits are thresholded from. Works at most
    `chunk` images (and about half a million pixels: temporaries stay in cache) at a time.
    """
    a = np.asarray(images)
    if a.dtype != np.uint8:
        raise ValueError(f"images must be uint8, got {a.dtype}")
    if a.ndim not in (3, 4):
        raise ValueError(f"expected (N, H, W) or (N, H, W, C) images, got shape {a.shape}")
    out = np.zeros(len(a), dtype=np.uint64)
    coef = np.zeros((len(a), HASH_SIZE, HASH_SIZE), dtype=np.float32) if coefficients else None
    chunk = max(1, min(chunk, (1 << 19) // max(a.shape[1] * a.shape[2], 1)))
    for s in range(0, len(a), chunk):
        part = a[s : s + chunk]
        grey = luma(part) if part.ndim == 4 else part
        px = resize_grey(grey)
        dct = scipy.fftpack.dct(scipy.fftpack.dct(px, axis=1), axis=2)
        low = dct[:, :HASH_SIZE, :HASH_SIZE].reshape(len(part), -1)
        out[s : s + chunk] = pack_bits(low > _median64(low))
        if coef is not None:
            coef[s : s + chunk] = low.reshape(-1, HASH_SIZE, HASH_SIZE)
    return (out, coef) if coefficients else out


def _median64(low: np.ndarray) -> np.ndarray:
    """(N, 64) -> (N, 1) medians as np.median computes them (the mean of the 32nd and 33rd
    smallest), by one partition: np.median's own overhead outweighs the work at this size."""
    part = np.partition(low, (31, 32), axis=1)
    return ((part[:, 31] + part[:, 32]) / 2.0)[:, None]


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


def fingerprint_images(images, batch: int = 256, coefficients: bool = False):
    """Perceptual hash and content hash of each image of an iterable (any sizes, in order);
    with `coefficients=True` also each image's (8, 8) low-frequency DCT block (float32).

    Images of one shape are hashed together in batches, so memory stays at `batch` images.
    """
    n = 0
    sha: list[str] = []
    pending: dict[tuple, list[tuple[int, np.ndarray]]] = {}
    result: dict[int, tuple] = {}
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
    hashes = np.array([result[i][0] for i in range(n)], dtype=np.uint64)
    if not coefficients:
        return hashes, sha
    coef = np.stack([result[i][1] for i in range(n)]) if n else np.zeros((0, HASH_SIZE, HASH_SIZE), np.float32)
    return hashes, sha, coef


def _flush(group, result) -> None:
    hashes, coef = phash_batch(np.stack([g for _, g in group]), coefficients=True)
    result.update(zip((i for i, _ in group), zip(hashes.tolist(), coef)))




def hex_to_uint64(values) -> np.ndarray:
    """16-digit hexadecimal strings (as `str(imagehash.phash(...))`) -> uint64."""
    return np.array([int(v, 16) for v in values], dtype=np.uint64)


def uint64_to_hex(values) -> list[str]:
    return [f"{int(v):016x}" for v in np.asarray(values, dtype=np.uint64)]
