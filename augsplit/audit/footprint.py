"""Pixel footprint overlap: which test objects cover a pixel some train object of their class covers.

Train footprints of each class are summed into a small coverage map (H x W). A summed-area
table of it answers "does this test bbox touch covered pixels?" in O(1) per row; only rows
that do and that have a mask are checked pixel by pixel. Rows without a mask are their bbox.

Masks reach the maps as canvas pixel indices, some thousand rows at a time (`mask_pixels`):
a mask loader with a `pixels` method (the audit's RowCache, through its guard) answers a
whole batch with array operations, any other callable is asked row by row.
"""

from __future__ import annotations

from typing import Callable

import numpy as np
import pandas as pd

from ..errors import DatasetError
from .result import FAIL, PASS, WARN, CheckResult, ids_at, top_rows

MaskLoader = Callable[[int], "np.ndarray | None"]


def clip_boxes(bbox: np.ndarray, hw: tuple[int, int]) -> np.ndarray:
    """(N, 4) boxes x0, y0, x1, y1 (x1, y1 one past the end) clipped to an H x W canvas."""
    h, w = hw
    b = np.asarray(bbox, dtype=np.int64).reshape(-1, 4).copy()
    b[:, [0, 2]] = np.clip(b[:, [0, 2]], 0, w)
    b[:, [1, 3]] = np.clip(b[:, [1, 3]], 0, h)
    b[:, 2] = np.maximum(b[:, 2], b[:, 0]); b[:, 3] = np.maximum(b[:, 3], b[:, 1])
    return b


def box_counts(bbox: np.ndarray, hw: tuple[int, int], groups: np.ndarray | None = None,
               n_groups: int = 1) -> np.ndarray:
    """How many boxes cover each pixel, per group: (n_groups, H, W) int64.

    2-D difference array (+1 at two corners, -1 at the other two) and two cumulative sums,
    so the cost is O(N + groups x H x W) whatever the box sizes.
    """
    h, w = hw
    b = clip_boxes(bbox, hw)
    g = np.zeros(len(b), np.int64) if groups is None else np.asarray(groups, np.int64)
    size = n_groups * (h + 1) * (w + 1)

    def at(y, x):
        return np.bincount(g * (h + 1) * (w + 1) + y * (w + 1) + x, minlength=size)

    diff = at(b[:, 1], b[:, 0]) + at(b[:, 3], b[:, 2]) - at(b[:, 1], b[:, 2]) - at(b[:, 3], b[:, 0])
    diff = diff.reshape(n_groups, h + 1, w + 1)
    return np.cumsum(np.cumsum(diff, axis=1), axis=2)[:, :h, :w]


def summed_area(binary: np.ndarray) -> np.ndarray:
    """(H, W) -> (H+1, W+1) table S with S[y, x] = sum of binary[:y, :x]."""
    s = np.zeros((binary.shape[0] + 1, binary.shape[1] + 1), dtype=np.int64)
    np.cumsum(np.cumsum(binary, axis=0, dtype=np.int64), axis=1, out=s[1:, 1:])
    return s


def box_sums(sat: np.ndarray, bbox: np.ndarray) -> np.ndarray:
    """Sum of the underlying map inside each (clipped) box, from its summed-area table."""
    b = np.asarray(bbox, dtype=np.int64)
    return sat[b[:, 3], b[:, 2]] - sat[b[:, 1], b[:, 2]] - sat[b[:, 3], b[:, 0]] + sat[b[:, 1], b[:, 0]]


def _mask_crop(mask_loader: MaskLoader, row: int, raw_box: np.ndarray, hw) -> np.ndarray | None:
    """The row's mask cut to the canvas, as bool; None when the loader has no mask for it."""
    m = mask_loader(int(row))
    if m is None:
        return None
    m = np.asarray(m).astype(bool, copy=False)
    x0, y0, x1, y1 = (int(v) for v in raw_box)
    if m.shape != (y1 - y0, x1 - x0):
        raise DatasetError(f"mask shape {m.shape} does not match its bbox {(y1 - y0, x1 - x0)}",
                           where=f"row {row}")
    h, w = hw
    top, left = max(0, -y0), max(0, -x0)  # the part on the canvas: empty for a box wholly off it
    return m[top:max(top, min(m.shape[0], h - y0)), left:max(left, min(m.shape[1], w - x0))]


# A batch of masks: at most this many rows, and at most this many pixels in their boxes (the
# frames the masks are cut in), so that the arrays made per pixel stay at tens of MB however
# large the objects are
MASK_BATCH = 1 << 14
MASK_BATCH_PX = 1 << 21


def row_pixels(mask_loader: MaskLoader, rows, boxes, hw) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The footprint pixels of some rows, asking the loader row by row: (has, owner, lin), with
    has[i] whether row i (an id the loader takes) gave a mask, and for every set pixel of those
    masks on the H x W canvas its position i and canvas index y * W + x. `boxes` are the rows'
    recorded boxes, the frame each mask is cut in (a mask of another shape is a DatasetError)."""
    boxes = np.asarray(boxes, np.int64).reshape(-1, 4)
    clipped = clip_boxes(boxes, hw)
    has = np.zeros(len(boxes), bool)
    owner, lin = [np.zeros(0, np.int64)], [np.zeros(0, np.int64)]
    for i, (row, raw) in enumerate(zip(rows, boxes)):
        m = _mask_crop(mask_loader, row, raw, hw)
        if m is None:
            continue
        has[i] = True
        ys, xs = np.nonzero(m)
        lin.append((ys + clipped[i, 1]) * hw[1] + xs + clipped[i, 0])
        owner.append(np.full(len(ys), i, np.int64))
    return has, np.concatenate(owner), np.concatenate(lin)


def mask_pixels(mask_loader, rows, boxes, hw, batch: int = MASK_BATCH, batch_px: int = MASK_BATCH_PX):
    """`row_pixels` of consecutive batches of rows (at most `batch` rows and `batch_px` pixels
    of boxes each, or one row): yields (lo, has, owner, lin), positions relative to lo. A
    loader's own `pixels(rows, boxes, hw)`, when it has one, answers each batch in its place:
    the same pixels for the rows it gives, and has False for a row it leaves out (the audit's
    guard asks those row by row, which records why)."""
    rows, boxes = np.asarray(rows), np.asarray(boxes, np.int64).reshape(-1, 4)
    bulk = getattr(mask_loader, "pixels", None)
    area = np.cumsum(np.clip(boxes[:, 2] - boxes[:, 0], 0, None) * np.clip(boxes[:, 3] - boxes[:, 1], 0, None))
    lo = 0
    while lo < len(rows):
        before = area[lo - 1] if lo else 0
        hi = min(max(int(np.searchsorted(area, before + batch_px, side="right")), lo + 1), lo + batch)
        part, frame = rows[lo:hi], boxes[lo:hi]
        yield (lo, *(bulk(part, frame, hw) if bulk is not None else row_pixels(mask_loader, part, frame, hw)))
        lo = hi


def _mask_flags(n: int, mask_loader, mask_rows) -> np.ndarray:
    """Which of n rows take their footprint from a mask (all, when no subset is named)."""
    flags = np.zeros(n, bool)
    if mask_loader is not None:
        if mask_rows is None:
            flags[:] = True
        else:
            flags[np.asarray(mask_rows, np.int64)] = True
    return flags


def build_coverage(bbox, groups, n_groups, hw, mask_loader=None, mask_rows=None, rows=None,
                   chunk: int = 1 << 18) -> tuple[np.ndarray, np.ndarray]:
    """Per-group binary coverage (n_groups, H, W) uint8 and the all-group count map (H, W).

    Rows listed in `mask_rows` (positions into `bbox`) use their mask instead of their bbox;
    `rows` maps positions to the ids the loader expects (default: the positions).
    """
    bbox = np.asarray(bbox, np.int64).reshape(-1, 4)
    groups = np.asarray(groups, np.int64)
    h, w = hw
    use_mask = _mask_flags(len(bbox), mask_loader, mask_rows)
    rows = np.arange(len(bbox)) if rows is None else np.asarray(rows)
    # State is one byte per pixel per class plus one count map: a group at a time, so no
    # (classes x H x W) integer array is ever held.
    binary = np.zeros((n_groups, h, w), dtype=np.uint8)
    counts = np.zeros((h, w), dtype=np.int64)
    flat = binary.reshape(-1)
    with_mask = np.flatnonzero(use_mask)
    boxed = [np.flatnonzero(~use_mask)]  # rows counted as their bbox: no mask wanted, or none given
    for lo, has, owner, lin in mask_pixels(mask_loader, rows[with_mask], bbox[with_mask], hw):
        part = with_mask[lo:lo + len(has)]
        boxed.append(part[~has])
        flat[groups[part[owner]] * (h * w) + lin] = 1
        counts += np.bincount(lin, minlength=h * w).reshape(h, w)
    plain = np.concatenate(boxed)
    order = plain[np.argsort(groups[plain], kind="stable")]
    bounds = np.searchsorted(groups[order], np.arange(n_groups + 1))
    for g in range(n_groups):
        members = order[bounds[g] : bounds[g + 1]]
        if len(members) == 0:
            continue
        cov = np.zeros((h, w), dtype=np.int64)
        for s in range(0, len(members), chunk):  # bounded temporaries
            cov += box_counts(bbox[members[s : s + chunk]], hw)[0]
        binary[g] |= cov > 0
        counts += cov
    return binary, counts


def shared_pixels(binary, bbox, groups, hw, mask_loader=None, mask_rows=None, rows=None,
                  chunk: int = 1 << 18) -> np.ndarray:
    """For each row: pixels of its footprint that its group's coverage map holds (exact)."""
    bbox = np.asarray(bbox, np.int64).reshape(-1, 4)
    groups = np.asarray(groups, np.int64)
    clipped = clip_boxes(bbox, hw)
    out = np.zeros(len(bbox), dtype=np.int64)
    has_mask = _mask_flags(len(bbox), mask_loader, mask_rows)
    rows = np.arange(len(bbox)) if rows is None else np.asarray(rows)
    order = np.argsort(groups, kind="stable")
    bounds = np.searchsorted(groups[order], np.arange(binary.shape[0] + 1))
    for g in range(binary.shape[0]):
        members = order[bounds[g] : bounds[g + 1]]
        if len(members) == 0:
            continue
        sat = summed_area(binary[g])
        for s in range(0, len(members), chunk):
            part = members[s : s + chunk]
            out[part] = box_sums(sat, clipped[part])  # exact for bbox footprints
    # the prefilter: a zero box sum proves no shared pixel, so masks load only for the others;
    # a row that gives no mask keeps its box's count
    picked = np.flatnonzero((out > 0) & has_mask)
    flat = binary.reshape(-1)
    h, w = hw
    for lo, has, owner, lin in mask_pixels(mask_loader, rows[picked], bbox[picked], hw):
        part = picked[lo:lo + len(has)]
        on = flat[groups[part[owner]] * (h * w) + lin] > 0
        out[part[has]] = np.bincount(owner[on], minlength=len(part))[has]
    return out


def _nearest_overlapping(train_bbox, train_groups, box, group) -> tuple[int, int]:
    """Train row of the same group whose bbox has the highest IoU with `box`, and the
    intersection area (-1, 0 if none overlaps)."""
    idx = np.flatnonzero(train_groups == group)
    if len(idx) == 0:
        return -1, 0
    b = train_bbox[idx]
    iw = np.minimum(b[:, 2], box[2]) - np.maximum(b[:, 0], box[0])
    ih = np.minimum(b[:, 3], box[3]) - np.maximum(b[:, 1], box[1])
    area = np.clip(iw, 0, None) * np.clip(ih, 0, None)
    union = (b[:, 2] - b[:, 0]) * (b[:, 3] - b[:, 1]) + (box[2] - box[0]) * (box[3] - box[1]) - area
    k = int(np.argmax(area / np.maximum(union, 1)))
    return (int(idx[k]), int(area[k])) if area[k] > 0 else (-1, 0)


def _n_masks(loader, n: int, rows) -> int:
    """Rows whose footprint may come from a mask (the loader may still answer None)."""
    return 0 if loader is None else (n if rows is None else len(rows))


def check_footprint(
    train_bbox: np.ndarray,
    test_bbox: np.ndarray,
    hw: tuple[int, int],
    train_class=None,
    test_class=None,
    mask_loader: MaskLoader | None = None,
    train_rows=None,
    test_rows=None,
    train_mask_rows=None,
    test_mask_rows=None,
    claim: bool | None = None,
    max_fraction: float = 0.0,
    train_ids=None,
    test_ids=None,
    pair: tuple[str, str] | None = None,
    worst_k: int = 20,
) -> CheckResult:
    """Fraction of test objects sharing at least one pixel with a same-class train footprint.

    `claim=True` (a declared footprint guarantee) fails above `max_fraction`; without a
    claim any overlap is a warning. `train_rows`/`test_rows` are the ids `mask_loader` takes.
    """
    h, w = int(hw[0]), int(hw[1])
    train_bbox = np.asarray(train_bbox, np.int64).reshape(-1, 4)
    test_bbox = np.asarray(test_bbox, np.int64).reshape(-1, 4)
    n_tr, n_te = len(train_bbox), len(test_bbox)
    if train_class is None or test_class is None:
        codes = np.zeros(n_tr + n_te, np.int64); names = np.array(["(all)"], dtype=object)
    else:
        codes, names = pd.factorize(np.concatenate([np.asarray(train_class, object), np.asarray(test_class, object)]))
        codes = codes.astype(np.int64)
    tr_g, te_g = codes[:n_tr], codes[n_tr:]
    n_groups = max(len(names), 1)
    binary, train_counts = build_coverage(train_bbox, tr_g, n_groups, (h, w), mask_loader, train_mask_rows, train_rows)
    shared = shared_pixels(binary, test_bbox, te_g, (h, w), mask_loader, test_mask_rows, test_rows)
    test_binary, test_counts = build_coverage(test_bbox, te_g, n_groups, (h, w), mask_loader,
                                              test_mask_rows, test_rows) if n_te else (binary * 0, np.zeros((h, w), np.int64))
    shared_map = (binary & test_binary).any(axis=0)
    hit = shared > 0
    n_hit = int(hit.sum())
    frac = n_hit / n_te if n_te else 0.0
    per_class = {}
    for g, name in enumerate(names):
        sel = te_g == g
        n = int(sel.sum())
        if n == 0:
            continue
        per_class[str(name)] = {"n_test": n, "n_overlapping": int(hit[sel].sum()),
                                "fraction_overlapping": float(hit[sel].mean()),
                                "shared_px_max": int(shared[sel].max()),
                                "train_covered_px": int(binary[g].sum())}
    numbers = {
        "canvas": [h, w], "n_train": n_tr, "n_test": n_te,
        "n_overlapping": n_hit, "fraction_overlapping": frac,
        "shared_px_total": int(shared.sum()), "shared_px_max": int(shared.max()) if n_te else 0,
        "shared_canvas_px": int(shared_map.sum()),
        "claim": claim, "max_fraction": max_fraction,
        "n_masks": _n_masks(mask_loader, n_tr, train_mask_rows) + _n_masks(mask_loader, n_te, test_mask_rows),
        "per_class": per_class,
    }
    train_ids = np.arange(n_tr) if train_ids is None else np.asarray(train_ids)
    test_ids = np.arange(n_te) if test_ids is None else np.asarray(test_ids)
    worst = top_rows(pd.DataFrame({"test_row": np.flatnonzero(hit), "test_id": test_ids[hit],
                                   "class": np.asarray(names, object)[te_g[hit]], "shared_px": shared[hit]}),
                     "shared_px", worst_k, ascending=False)
    if len(worst):
        near = [_nearest_overlapping(clip_boxes(train_bbox, (h, w)), tr_g, clip_boxes(test_bbox[r], (h, w))[0], te_g[r])
                for r in worst["test_row"]]
        worst["train_row"] = [a for a, _ in near]
        worst["train_id"] = ids_at(train_ids, np.array([a for a, _ in near], np.int64))
        worst["bbox_overlap_px"] = [b for _, b in near]
    if claim:
        verdict = FAIL if frac > max_fraction else PASS
    else:
        verdict = WARN if n_hit else PASS
    whose = " of their class" if test_class is not None else ""
    detail = (f"{n_hit} of {n_te} test objects ({frac:.2%}) share pixels with a train footprint{whose}"
              if n_hit else f"no test object shares a pixel with any train footprint{whose} ({n_te} checked)")
    return CheckResult("footprint_overlap", verdict, numbers, worst, detail, pair,
                       arrays={"train_coverage": train_counts, "test_coverage": test_counts, "shared_map": shared_map})
