"""COCO run-length encoded masks: decode (compressed string or list of counts) and encode.

The counts alternate runs of 0s and 1s, starting with 0s, over the mask read column by column
(Fortran order). The compressed form writes each count (after the third, as the difference to
the count two before) in 5-bit groups, low first, as characters from '0' (48): bit 0x20 says
"more groups follow" and bit 0x10 of the last group is the sign. This is the layout of the COCO
API's mask encoding (from memory of its C source, checked in the tests against pycocotools).
"""

from __future__ import annotations

import numpy as np

from ..errors import DatasetError


def counts_from_string(s: str, where: str = "rle") -> list[int]:
    counts: list[int] = []
    p, n = 0, len(s)
    while p < n:
        x, k, more = 0, 0, True
        while more:
            if p >= n:
                raise DatasetError("RLE string ends inside a number", where=where)
            c = ord(s[p]) - 48
            if not 0 <= c < 64:
                raise DatasetError(f"RLE string holds {s[p]!r}, not a counts character", where=where)
            x |= (c & 0x1F) << (5 * k)
            more = bool(c & 0x20)
            p += 1
            k += 1
            if not more and (c & 0x10):
                x -= 1 << (5 * k)  # sign-extend the last group
        if len(counts) > 2:
            x += counts[-2]
        counts.append(x)
    return counts


def counts_to_string(counts) -> str:
    out = []
    for i, x in enumerate(int(v) for v in counts):
        if i > 2:
            x -= int(counts[i - 2])
        more = True
        while more:
            c = x & 0x1F
            x >>= 5  # arithmetic shift: negative numbers stay negative
            more = (x != -1) if (c & 0x10) else (x != 0)
            if more:
                c |= 0x20
            out.append(chr(c + 48))
    return "".join(out)


def decode(rle: dict, where: str = "rle") -> np.ndarray:
    """{"size": [h, w], "counts": str | [int, ...]} -> bool mask (h, w)."""
    try:
        h, w = (int(v) for v in rle["size"])
        counts = rle["counts"]
    except (KeyError, TypeError, ValueError):
        raise DatasetError("an RLE mask is {size: [height, width], counts: ...}", where=where) from None
    if isinstance(counts, bytes):
        counts = counts.decode("ascii")
    if isinstance(counts, str):
        counts = counts_from_string(counts, where)
    runs = np.asarray(counts, dtype=np.int64)
    if runs.ndim != 1 or (runs < 0).any() or runs.sum() != h * w:
        raise DatasetError(f"RLE counts do not add up to the mask's {h} x {w} pixels", where=where)
    values = np.arange(len(runs)) % 2 == 1
    flat = np.repeat(values, runs)
    return flat.reshape((w, h)).T.copy()


def encode(mask: np.ndarray) -> dict:
    """bool mask (h, w) -> compressed RLE {"size": [h, w], "counts": str}."""
    m = np.asarray(mask, dtype=bool)
    h, w = m.shape
    flat = m.T.reshape(-1)
    change = np.flatnonzero(flat[1:] != flat[:-1]) + 1
    edges = np.concatenate([[0], change, [flat.size]])
    runs = np.diff(edges).tolist()
    if flat.size and flat[0]:
        runs = [0] + runs  # counts start with a run of zeros
    return {"size": [int(h), int(w)], "counts": counts_to_string(runs)}
