"""The per-object table every annotated format is read into, box conventions, and masks.

One row per object: its image (`image_id`, `file`, `width`, `height` in px), the `label` as the
user wrote it, an `object_id`, its box `bbox_x0, bbox_y0, bbox_x1, bbox_y1` in px of its own
image (continuous coordinates: x0 is the left edge of the first pixel, x1 the right edge of the
last) and optionally a `segmentation` in COCO's form (a list of px polygons [x, y, x, y, ...] or
an RLE dict {"size": [h, w], "counts": ...}). Images without objects are listed in `images`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import DatasetError

BOX = ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1")
IMAGE_KEYS = ("image_id", "file", "width", "height")
OBJECT_COLUMNS = (*IMAGE_KEYS, "label", "object_id", *BOX, "segmentation")

MAX_PIXELS = 1 << 28  # the largest image (width x height) whose masks are decoded or rasterised
CONVENTIONS = ("xyxy", "xywh", "cxcywh")  # corners; top-left corner and size; centre and size
UNITS = ("px", "norm")  # pixels of the image, or fractions of its width and height

# Column names a table commonly uses for each convention (first complete set wins).
BOX_NAMES = {
    "xyxy": (BOX, ("x0", "y0", "x1", "y1"), ("xmin", "ymin", "xmax", "ymax"), ("x1", "y1", "x2", "y2"),
             ("left", "top", "right", "bottom")),
    "xywh": (("bbox_x", "bbox_y", "bbox_w", "bbox_h"), ("x", "y", "w", "h"), ("x", "y", "width", "height")),
    "cxcywh": (("cx", "cy", "w", "h"), ("x_center", "y_center", "w", "h"), ("x_center", "y_center", "width", "height")),
}


@dataclass(frozen=True)
class Objects:
    """An annotated dataset read into the per-object table (see the module docstring).

    `images`: one row per image (IMAGE_KEYS), objects or not, in the source's order.
    `kind`: the format it came from; `path`: what was read; `root`: where image files are;
    `raw`: what writing back needs (the COCO JSON, the label files' paths, ...).
    """

    objects: pd.DataFrame
    images: pd.DataFrame
    kind: str
    path: Path
    root: Path
    raw: object = field(default=None, compare=False, repr=False)

    def __repr__(self) -> str:
        return f"Objects({self.kind}, {self.path}, images={len(self.images)}, objects={len(self.objects)})"


def object_frame(rows: dict, n: int) -> pd.DataFrame:
    """The per-object table from column lists (missing columns become empty)."""
    data = {c: rows.get(c, [None] * n) for c in OBJECT_COLUMNS}
    df = pd.DataFrame(data, columns=list(OBJECT_COLUMNS))
    for c in BOX + ("width", "height"):
        df[c] = pd.to_numeric(df[c], errors="coerce").astype(float)
    return df


def to_xyxy(a, b, c, d, convention: str):
    """Four coordinates in `convention` -> corners (x0, y0, x1, y1), same units."""
    a, b, c, d = (np.asarray(v, dtype=float) for v in (a, b, c, d))
    if convention == "xyxy":
        return a, b, c, d
    if convention == "xywh":
        return a, b, a + c, b + d
    if convention == "cxcywh":
        return a - c / 2.0, b - d / 2.0, a + c / 2.0, b + d / 2.0
    raise DatasetError(f"unknown box convention {convention!r} (use {', '.join(CONVENTIONS)})", where="boxes")


def to_px(x0, y0, x1, y1, units: str, width, height):
    """Corners in `units` -> px of the image (`norm` multiplies by the image's width and height)."""
    if units == "px":
        return x0, y0, x1, y1
    if units == "norm":
        w, h = np.asarray(width, float), np.asarray(height, float)
        return x0 * w, y0 * h, x1 * w, y1 * h
    raise DatasetError(f"unknown box units {units!r} (use {' or '.join(UNITS)})", where="boxes")


def box_columns(columns, convention: str, named: tuple[str, ...] | None, where: str) -> tuple[str, ...]:
    """The table's four columns holding boxes in `convention`: those named, or a usual set."""
    cols = list(columns)
    if named is not None:
        if len(named) != 4:
            raise DatasetError(f"name four box columns, got {len(named)}: {', '.join(named)}", where=where)
        missing = [c for c in named if c not in cols]
        if missing:
            raise DatasetError(f"no column {missing[0]!r} (columns: {', '.join(map(str, cols[:12]))})", where=where)
        return tuple(named)
    for names in BOX_NAMES[convention]:
        if set(names) <= set(cols):
            return names
    usual = "; ".join(", ".join(n) for n in BOX_NAMES[convention])
    raise DatasetError(f"no {convention} box columns ({usual}); name them with --box-columns", where=where)


def looks_like_boxes(columns) -> tuple[str, ...] | None:
    """A set of box-like columns other than augsplit's own bbox_x0..bbox_y1, if the table has one.

    Such a table must say its convention: `x, y, w, h` read as a centre would put every object
    half a box off (common practice, no source: COCO's `x, y` is the top-left corner).
    """
    cols = set(columns)
    for conv in CONVENTIONS:
        for names in BOX_NAMES[conv]:
            if names != BOX and set(names) <= cols:
                return names
    return None


def segmentation_mask(seg, height: int, width: int, where: str) -> np.ndarray | None:
    """A COCO segmentation (polygons in px, or RLE) -> bool mask of the whole image (None if absent)."""
    if seg is None or (isinstance(seg, float) and np.isnan(seg)):
        return None
    if isinstance(seg, dict):
        from .rle import decode

        if list(seg.get("size") or []) != [int(height), int(width)]:
            raise DatasetError(f"the RLE mask's size {seg.get('size')} is not its image's [{height}, {width}]", where=where)
        return decode(seg, where)
    if isinstance(seg, (list, tuple)):
        return polygons_mask(seg, height, width, where)
    raise DatasetError(f"segmentation is neither polygons nor RLE ({type(seg).__name__})", where=where)


def polygons_mask(polys, height: int, width: int, where: str, scale=(1.0, 1.0), offset=(0.0, 0.0)) -> np.ndarray:
    """Polygons [x, y, x, y, ...] in px -> bool mask (H, W) of the pixels whose centre is inside
    (even-odd rule per polygon; the parts of an object add up). Points are mapped by
    p * scale - offset first (to rasterise a crop of a resized image)."""
    out = np.zeros((int(height), int(width)), bool)
    yc = np.arange(int(height)) + 0.5
    for k, p in enumerate(polys):
        try:
            a = np.asarray(p, dtype=float).reshape(-1)
        except (ValueError, TypeError, OverflowError):
            a = np.zeros(0)
        if a.size < 6 or a.size % 2 or not np.all(np.isfinite(a)):
            raise DatasetError("a polygon is at least three x, y pairs of finite numbers", where=f"{where} polygon {k}")
        xy = a.reshape(-1, 2) * np.asarray(scale, float) - np.asarray(offset, float)
        x0, y0 = xy[:, 0], xy[:, 1]
        x1, y1 = np.roll(x0, -1), np.roll(y0, -1)
        # scanline at each row's centre: an edge counts on [min y, max y), so a vertex counts once
        lo, hi = np.minimum(y0, y1), np.maximum(y0, y1)
        cross = (yc[:, None] >= lo) & (yc[:, None] < hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            xs = np.where(cross, x0 + (yc[:, None] - y0) * (x1 - x0) / (y1 - y0), np.inf)
        xs.sort(axis=1)
        part = np.zeros_like(out)
        for i in np.flatnonzero(cross.any(axis=1)):
            row = xs[i][np.isfinite(xs[i])]
            for xa, xb in zip(row[0::2], row[1::2]):  # pixel j is inside when xa <= j + 0.5 < xb
                ja, jb = max(int(np.ceil(xa - 0.5)), 0), min(int(np.ceil(xb - 0.5)), int(width))
                if jb > ja:
                    part[i, ja:jb] ^= True
        out |= part
    return out


def mask_bbox(mask: np.ndarray) -> tuple[int, int, int, int] | None:
    """(x0, y0, x1, y1) of the True pixels, x1/y1 one past the end; None when empty."""
    rows, cols = np.any(mask, axis=1), np.any(mask, axis=0)
    if not rows.any():
        return None
    y0, y1 = np.flatnonzero(rows)[[0, -1]]
    x0, x1 = np.flatnonzero(cols)[[0, -1]]
    return int(x0), int(y0), int(x1) + 1, int(y1) + 1


def check_boxes(df: pd.DataFrame, where: str) -> None:
    """Every box is four finite numbers with x0 < x1 and y0 < y1, and every image size positive."""
    b = df[list(BOX)].to_numpy(float)
    bad = ~np.all(np.isfinite(b), axis=1) | (b[:, 2] <= b[:, 0]) | (b[:, 3] <= b[:, 1])
    if bad.any():
        _refuse(df, bad, "boxes are empty or not finite numbers", where)
    size = df[["width", "height"]].to_numpy(float)
    bad = ~(np.all(np.isfinite(size), axis=1) & np.all(size > 0, axis=1))
    if bad.any():
        _refuse(df, bad, "image width/height missing or not positive", where)
    bad = size[:, 0] * size[:, 1] > MAX_PIXELS
    if bad.any():
        _refuse(df, bad, f"images larger than {MAX_PIXELS} px", where)


def dataset_box(root: Path, place: str = "dataset folder"):
    """The closed Box (dataset/images.py) a reader of an annotated dataset reads all its files
    through: made once per read, so the folder is resolved once and every file is judged
    against that one folder; names are taken literally (found by listing, or resolved).
    `place` names the folder in messages."""
    from ..dataset.images import Box

    return Box(root, literal=True, place=place)


def read_file(box, p: Path, limit: int, what: str) -> bytes:
    """The bytes of `p`, a file of the dataset whose `dataset_box` is `box` (links that stay
    inside followed): a regular file inside the folder, checked before it is opened and again
    once open, at most `limit` bytes; else a one-line DatasetError naming it. augsplit reads
    nothing outside the folders it is given."""
    return box.naming(what).read(Path(p).relative_to(box.root).as_posix(), limit, where=str(p))


def image_path(root: Path, name: str, where: str) -> Path:
    """An image file named by the annotations, which must lie inside the images folder."""
    base = Path(root).resolve()
    p = (base / str(name)).resolve()
    if not p.is_relative_to(base):
        raise DatasetError(f"the image path {name!r} leaves the images folder {base}", where=where,
                           hint="give the folder the paths are relative to (--images)")
    return p


def _refuse(df, bad, what, where):
    idx = np.flatnonzero(bad)
    ids = ", ".join(f"{df['image_id'].iloc[i]}" for i in idx[:3])
    raise DatasetError(f"{idx.size} {what} (objects in images {ids}{' ...' if idx.size > 3 else ''})", where=where)
