"""Pixel overlap against category: do same-class objects across two splits share fewer pixels
than different-class objects within a split? When they do, raw pixels point away from the
labels and only an invariant model can succeed: the hard held-out case."""

from __future__ import annotations

import numpy as np

from .footprint import MaskLoader, _mask_crop, clip_boxes
from .result import FAIL, PASS, CheckResult


def box_iou(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Intersection over union of paired pixel boxes (x0, y0, x1, y1), vectorised."""
    iw = np.clip(np.minimum(a[:, 2], b[:, 2]) - np.maximum(a[:, 0], b[:, 0]), 0, None)
    ih = np.clip(np.minimum(a[:, 3], b[:, 3]) - np.maximum(a[:, 1], b[:, 1]), 0, None)
    inter = iw * ih
    union = (a[:, 2] - a[:, 0]) * (a[:, 3] - a[:, 1]) + (b[:, 2] - b[:, 0]) * (b[:, 3] - b[:, 1]) - inter
    return np.where(union > 0, inter / np.maximum(union, 1), 0.0)


def mask_iou(box_a, mask_a, box_b, mask_b) -> float:
    """IoU of two footprints given as canvas boxes with bool masks (None = the full box)."""
    x0, y0 = min(box_a[0], box_b[0]), min(box_a[1], box_b[1])
    x1, y1 = max(box_a[2], box_b[2]), max(box_a[3], box_b[3])
    if x1 <= x0 or y1 <= y0:
        return 0.0
    canvas = np.zeros((2, y1 - y0, x1 - x0), bool)
    for k, (bx, m) in enumerate(((box_a, mask_a), (box_b, mask_b))):
        sub = canvas[k, bx[1] - y0 : bx[3] - y0, bx[0] - x0 : bx[2] - x0]
        sub |= True if m is None else m
    union = np.count_nonzero(canvas[0] | canvas[1])
    return np.count_nonzero(canvas[0] & canvas[1]) / union if union else 0.0


def _same_class_pairs(a_cls, b_cls, n, rng):
    """n random (a row, b row) pairs of equal class: a b row, then an a row of its class."""
    order = np.argsort(a_cls, kind="stable")
    sorted_cls = a_cls[order]
    lo = np.searchsorted(sorted_cls, b_cls, side="left"); hi = np.searchsorted(sorted_cls, b_cls, side="right")
    ok = np.flatnonzero(hi > lo)
    if len(ok) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    jb = ok[rng.integers(0, len(ok), n)]
    ja = order[lo[jb] + (rng.random(n) * (hi[jb] - lo[jb])).astype(np.int64)]
    return ja, jb


def _diff_class_pairs(cls, n, rng, tries: int = 20):
    """n random pairs of rows of different classes within one split (rejection, vectorised)."""
    if len(cls) < 2 or len(np.unique(cls)) < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    i = rng.integers(0, len(cls), n); j = rng.integers(0, len(cls), n)
    for _ in range(tries):
        same = cls[i] == cls[j]
        if not same.any():
            break
        j[same] = rng.integers(0, len(cls), int(same.sum()))
    keep = cls[i] != cls[j]
    return i[keep], j[keep]


def check_category_overlap(a_bbox, a_class, b_bbox, b_class, rng: np.random.Generator, hw,
                           n_pairs: int = 2000, mask_loader: MaskLoader | None = None,
                           a_rows=None, b_rows=None, max_ratio: float | None = None,
                           pair: tuple[str, str] | None = None) -> CheckResult:
    """Mean footprint IoU of same-class pairs across the splits over different-class pairs within
    each split, from `n_pairs` pairs of each kind drawn with `rng`. Informative (pass) unless a
    `max_ratio` is declared."""
    a_bbox = clip_boxes(a_bbox, hw); b_bbox = clip_boxes(b_bbox, hw)
    a_cls = np.asarray(a_class).astype(str); b_cls = np.asarray(b_class).astype(str)
    sa, sb = _same_class_pairs(a_cls, b_cls, n_pairs, rng)
    half = n_pairs // 2
    da = _diff_class_pairs(a_cls, half, rng); db = _diff_class_pairs(b_cls, n_pairs - half, rng)

    def ious(bx1, rows1, i1, bx2, rows2, i2):
        if mask_loader is None:
            return box_iou(bx1[i1], bx2[i2])
        r1 = np.arange(len(bx1)) if rows1 is None else np.asarray(rows1)
        r2 = np.arange(len(bx2)) if rows2 is None else np.asarray(rows2)
        return np.array([mask_iou(bx1[p], _mask_crop(mask_loader, r1[p], bx1[p], hw), bx2[q],
                                  _mask_crop(mask_loader, r2[q], bx2[q], hw)) for p, q in zip(i1, i2)])

    same = ious(a_bbox, a_rows, sa, b_bbox, b_rows, sb)
    diff = np.concatenate([ious(a_bbox, a_rows, da[0], a_bbox, a_rows, da[1]),
                           ious(b_bbox, b_rows, db[0], b_bbox, b_rows, db[1])])
    if len(same) == 0 or len(diff) == 0:
        reason = "no class occurs in both splits" if len(same) == 0 else "fewer than two classes in the splits"
        return CheckResult("category_overlap", PASS, {"n_same_pairs": int(len(same)), "n_diff_pairs": int(len(diff)),
                           "ratio": None}, None, f"not measurable: {reason}", pair)
    m_same, m_diff = float(same.mean()), float(diff.mean())
    ratio = m_same / m_diff if m_diff > 0 else (None if m_same == 0 else float("inf"))
    numbers = {"footprint": "mask" if mask_loader is not None else "bbox",
               "n_same_pairs": int(len(same)), "n_diff_pairs": int(len(diff)),
               "mean_iou_same_class_across": m_same, "mean_iou_diff_class_within": m_diff,
               "ratio": ratio if ratio is not None and np.isfinite(ratio) else None, "max_ratio": max_ratio}
    if ratio is None:
        detail = "no sampled pair of either kind shares a pixel: the ratio is undefined"
    else:
        hard = m_same < m_diff
        detail = (f"same-class pairs across the splits overlap {'less than' if hard else 'at least as much as'} "
                  f"different-class pairs within a split (mean IoU {m_same:.3g} vs {m_diff:.3g}, ratio {ratio:.3g}): "
                  + ("raw pixels point away from the labels, a hard held-out split" if hard
                     else "pixel overlap alone can carry the label, an easy held-out split"))
    verdict = FAIL if (max_ratio is not None and ratio is not None and ratio > max_ratio) else PASS
    return CheckResult("category_overlap", verdict, numbers, None, detail, pair,
                       arrays={"iou_same": same, "iou_diff": diff})
