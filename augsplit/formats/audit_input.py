"""The per-object table as the leakage audit reads it: one row per object with its split (its
image's), class (the label as written), parameters, and its box in px of one common frame,
plus a loader for its mask (from polygons or RLE) and the path of its image.

Every image is stretched onto the frame (the spec's canvas; without a spec, the images' common
size, or the largest width and height), so "the same pixel" means the same place relative to
the image, as it does for a model that resizes its inputs.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from ..errors import DatasetError
from ..space.axes import POSITION_AXES
from .boxes import MAX_PIXELS, Objects, image_path, polygons_mask, segmentation_mask


@dataclass(frozen=True)
class AuditInput:
    table: pd.DataFrame  # split, image_id, class_name, class_index, parameters, bbox_x0..bbox_y1 (int, frame px)
    axes: dict  # the parameters the data really gives: name -> Axis (with a spec) or (lo, hi, periodic)
    canvas_hw: tuple[int, int]
    mask_loader: Callable[[int], np.ndarray | None]
    mask_rows: np.ndarray  # rows whose footprint is a mask (the others are their box)
    image_paths: np.ndarray  # per row: its image file (Path, links resolved), or None when the source names none
    image_root: Path  # the real folder they lie in (image_path checked it), which they are read inside
    notes: tuple[str, ...] = ()

    def __repr__(self) -> str:
        return (f"AuditInput(rows={len(self.table)}, axes={list(self.axes)}, canvas={self.canvas_hw}, "
                f"masks={len(self.mask_rows)})")


def frame_size(objs: Objects, plan=None) -> tuple[int, int]:
    """(height, width) of the common frame."""
    if plan is not None:
        return int(plan.canvas.height), int(plan.canvas.width)
    size = objs.objects[["height", "width"]].astype(float)  # sizes checked against MAX_PIXELS by the readers
    if size.empty:
        raise DatasetError("no objects to audit", where=str(objs.path))
    h, w = int(size["height"].max()), int(size["width"].max())
    if h * w > MAX_PIXELS:
        raise DatasetError(f"the largest height and width make a {w} x {h} frame, larger than {MAX_PIXELS} px",
                           where=str(objs.path), hint="give a spec: its canvas is the frame")
    return h, w


def audit_input(objs: Objects, image_split, plan=None, ref_size: float | None = None) -> AuditInput:
    """`image_split`: the split of each image of `objs.images`, in order."""
    o = objs.objects
    split_of = dict(zip(objs.images["image_id"], np.asarray(image_split, dtype=object)))
    hw = frame_size(objs, plan)
    sx = hw[1] / o["width"].to_numpy(float)
    sy = hw[0] / o["height"].to_numpy(float)
    box = np.column_stack([np.floor(o["bbox_x0"] * sx), np.floor(o["bbox_y0"] * sy),
                           np.ceil(o["bbox_x1"] * sx), np.ceil(o["bbox_y1"] * sy)]).astype(np.int64)
    table = pd.DataFrame({"split": o["image_id"].map(split_of).astype(str).to_numpy(),
                          "image_id": o["image_id"].astype(str).to_numpy(), "class_name": o["label"].astype(str).to_numpy(),
                          "bbox_x0": box[:, 0], "bbox_y0": box[:, 1], "bbox_x1": box[:, 2], "bbox_y1": box[:, 3],
                          "width": hw[1], "height": hw[0]})
    notes: list[str] = []
    if plan is not None:
        axes = _spec_parameters(table, objs, plan, ref_size, notes)
    else:
        axes = _box_parameters(table, o, notes)
    segs = o["segmentation"].to_numpy(object)
    mask_rows = np.flatnonzero([s is not None and not (isinstance(s, float) and np.isnan(s)) for s in segs])
    paths = np.array([image_path(objs.root, f, str(objs.path)) if f else None for f in o["file"].fillna("").astype(str)],
                     dtype=object)
    return AuditInput(table, axes, hw, _MaskLoader(objs, segs, box, sx, sy, hw), mask_rows, paths,
                      Path(objs.root).resolve(), tuple(notes))


def _spec_parameters(table: pd.DataFrame, objs: Objects, plan, ref_size, notes: list[str]) -> dict:
    """Add the spec's parameters the data gives (and the class index) to `table`; their axes."""
    from ..assign import class_column, depends_on_class, derive_parameters
    from .placement import canvas_table

    frame = canvas_table(objs, plan, objs.raw if isinstance(objs.raw, pd.DataFrame) else None)
    params = derive_parameters(frame, plan, ref_size, str(objs.path))
    given = [n for n in params.columns if n in POSITION_AXES or n in frame.columns or (n == "scale" and ref_size)]
    for n in params.columns:
        table[n] = params[n].to_numpy()
    cls = class_column(frame, plan, str(objs.path)) if any(depends_on_class(s.region) for s in plan.splits) else None
    table["class_index"] = cls if cls is not None else 0.0
    skipped = [n for n in params.columns if n not in given]
    if skipped:
        notes.append(f"axes the data does not give are not audited: {', '.join(skipped)}")
    return {n: plan.space[n] for n in given}


def _box_parameters(table: pd.DataFrame, o: pd.DataFrame, notes: list[str]) -> dict:
    """Without a spec: the box centre as fractions of the image and its relative size."""
    w, h = o["width"].to_numpy(float), o["height"].to_numpy(float)
    table["x"] = ((o["bbox_x0"] + o["bbox_x1"]) / 2.0 / w).to_numpy()
    table["y"] = ((o["bbox_y0"] + o["bbox_y1"]) / 2.0 / h).to_numpy()
    table["size"] = np.sqrt((o["bbox_x1"] - o["bbox_x0"]) * (o["bbox_y1"] - o["bbox_y0"]) / (w * h)).to_numpy()
    notes.append("no spec: positions as fractions of the image, size as sqrt(box area / image area)")
    return {"x": (0.0, 1.0, False), "y": (0.0, 1.0, False), "size": (None, None, False, "log")}


class _MaskLoader:
    """Row -> its object's mask inside its frame box (None for a box-only object)."""

    def __init__(self, objs: Objects, segs, box, sx, sy, hw):
        self.objs, self.segs, self.box, self.sx, self.sy, self.hw = objs, segs, box, sx, sy, hw

    def __call__(self, i: int):
        o = self.objs.objects
        seg = self.segs[int(i)]
        if seg is None:
            return None
        x0, y0, x1, y1 = (int(v) for v in self.box[int(i)])
        where = f"{self.objs.path} object {o['object_id'].iat[int(i)]}"
        if isinstance(seg, list):
            return polygons_mask(seg, y1 - y0, x1 - x0, where, (self.sx[int(i)], self.sy[int(i)]), (x0, y0))
        import cv2

        hw = self.hw
        full = segmentation_mask(seg, int(o["height"].iat[int(i)]), int(o["width"].iat[int(i)]), where)
        full = cv2.resize(full.astype(np.uint8), (hw[1], hw[0]), interpolation=cv2.INTER_NEAREST)
        out = np.zeros((y1 - y0, x1 - x0), bool)
        cy0, cx0 = max(y0, 0), max(x0, 0)
        part = full[cy0:max(y1, 0), cx0:max(x1, 0)] > 0
        out[cy0 - y0: cy0 - y0 + part.shape[0], cx0 - x0: cx0 - x0 + part.shape[1]] = part
        return out
