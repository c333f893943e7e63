"""Split annotated data by where its objects lie: open COCO / YOLO / VOC / a table of boxes as
the per-object table, map every image onto the spec's canvas (so each image's own size is
used: a position is a fraction of its image, then px or deg of the canvas), label every object
with assign.assign, and give each image one split by the user's rule for images whose objects
fall in different splits (`drop`, `keep` as a `mixed` split, or the `largest` object's split).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..assign import DROPPED, EMPTY, LABEL_COLUMNS, MIXED, OUTSIDE, SPLIT_COLUMN, Assignment, assign
from ..errors import DatasetError
from .table import open_table_file
from .boxes import BOX, CONVENTIONS, Objects, box_columns, check_boxes, looks_like_boxes, object_frame, to_px, to_xyxy

FORMATS = ("auto", "coco", "yolo", "voc", "table")
MIXED_RULES = ("drop", "keep", "largest")
OBJECT_SPLIT = "object_split"
IMAGE_KEY_COLUMNS = ("image_id", "file_name", "file", "image")
SIZE_COLUMNS = (("image_width", "image_height"), ("width", "height"))


@dataclass(frozen=True)
class BoxOptions:
    """How a table gives its boxes: convention, units and (optionally) the four column names."""

    convention: str | None = None  # xyxy, xywh, cxcywh; None: augsplit's bbox_* columns if present
    units: str = "px"  # px or norm (fractions of the image's width and height)
    columns: tuple[str, ...] | None = None


def detect_format(path: str | Path) -> str:
    from .voc import is_voc
    from .yolo import is_yolo

    p = Path(path)
    if not p.exists():
        raise DatasetError("no such file or folder", where=str(p))
    if p.is_file():
        return "coco" if p.suffix.lower() == ".json" else "table"
    if is_voc(p):
        return "voc"
    if is_yolo(p):
        return "yolo"
    return "table"  # a folder of Parquet files


def open_objects(path, fmt: str = "auto", boxes: BoxOptions = BoxOptions(), images_root=None,
                 default_size: tuple[int, int] | None = None) -> Objects | pd.DataFrame:
    """The input as the per-object table, or (a table without boxes) the table itself."""
    fmt = detect_format(path) if fmt == "auto" else fmt
    if fmt == "coco":
        from .coco import read_coco

        return read_coco(path, images_root)
    if images_root is not None and fmt in ("yolo", "voc"):
        raise DatasetError(f"a {fmt.upper()} folder holds its own images; --images names where a COCO file's or a "
                           "table's image paths resolve", where="--images")
    if fmt == "yolo":
        from .yolo import read_yolo

        return read_yolo(path)
    if fmt == "voc":
        from .voc import read_voc

        return read_voc(path)
    if fmt != "table":
        raise DatasetError(f"unknown format {fmt!r} (use {', '.join(FORMATS)})", where=str(path))
    # every CSV cell as written (ids like 007, labels like 1, NA): the split column is added to
    # the user's table and nothing else in it changes; numbers are parsed where they are used
    t = open_table_file(path)
    df = dataclasses.replace(t, text=t.columns).read()
    return table_objects(df, boxes, str(path), default_size, Path(path), images_root) or df


def table_objects(df: pd.DataFrame, boxes: BoxOptions, where: str, default_size=None, path=None,
                  images_root=None) -> Objects | None:
    """A table whose rows are objects with boxes -> Objects (None when it has no boxes)."""
    found = _table_box_columns(df, boxes, where)
    if found is None:
        return None
    conv, cols = found
    n = len(df)
    size = next((c for c in SIZE_COLUMNS if set(c) <= set(df.columns) and not set(c) & set(cols)), None)
    w, h = _image_sizes(df, size, default_size, where)
    vals = [pd.to_numeric(df[c], errors="coerce").to_numpy(float) for c in cols]
    x0, y0, x1, y1 = to_px(*to_xyxy(*vals, conv), boxes.units, w, h)
    key = _first_column(df, IMAGE_KEY_COLUMNS)
    ids = df[key].to_numpy() if key is not None else np.arange(n)
    label = _first_column(df, LABEL_COLUMNS)
    file = _first_column(df, ("file_name", "file", "path"))
    rows = {"image_id": ids, "file": df[file].astype(str).to_numpy() if file else [""] * n, "width": w, "height": h,
            "label": df[label].astype(str).to_numpy() if label else [None] * n, "object_id": np.arange(n),
            "bbox_x0": x0, "bbox_y0": y0, "bbox_x1": x1, "bbox_y1": y1}
    objects = object_frame(rows, n)
    objects.attrs["box_columns"] = tuple(cols) + (size or ())
    check_boxes(objects, where)
    images = objects.drop_duplicates("image_id")[["image_id", "file", "width", "height"]].reset_index(drop=True)
    p = Path(path) if path is not None else Path(where)
    return Objects(objects, images, "table", p, Path(images_root) if images_root is not None else p.parent, df)


def _first_column(df: pd.DataFrame, names) -> str | None:
    return next((c for c in names if c in df.columns), None)


def _table_box_columns(df: pd.DataFrame, boxes: BoxOptions, where: str):
    """The table's box convention and its four columns (None when the table has no boxes)."""
    conv = boxes.convention
    if conv is not None:
        if conv not in CONVENTIONS:
            raise DatasetError(f"unknown box convention {conv!r} (use {', '.join(CONVENTIONS)})", where=where)
        return conv, box_columns(df.columns, conv, boxes.columns, where)
    if set(BOX) <= set(df.columns):
        return "xyxy", BOX
    if {"bbox_x", "bbox_y", "bbox_w", "bbox_h"} <= set(df.columns):
        return "xywh", ("bbox_x", "bbox_y", "bbox_w", "bbox_h")
    if boxes.columns is not None:
        raise DatasetError("--box-columns needs --boxes (xyxy, xywh or cxcywh)", where=where)
    guess = looks_like_boxes(df.columns)
    if guess is not None:
        raise DatasetError(f"columns {', '.join(guess)} look like boxes: name their convention with --boxes "
                           f"({', '.join(CONVENTIONS)}) and --box-units (px or norm)", where=where)
    return None


def _image_sizes(df: pd.DataFrame, size, default_size, where: str):
    """Per row the image's width and height: from the size columns, else the default size."""
    if size is not None:
        return (pd.to_numeric(df[c], errors="coerce").to_numpy(float) for c in size)
    if default_size is not None:
        n = len(df)
        return np.full(n, float(default_size[0])), np.full(n, float(default_size[1]))
    raise DatasetError("the table has no image size columns (image_width, image_height)", where=where)


def canvas_table(objs: Objects, plan, extra: pd.DataFrame | None = None) -> pd.DataFrame:
    """What assign reads: every box mapped onto the spec's canvas (its image stretched to the
    canvas), the labels, and any spec-axis columns a table gives besides its boxes."""
    o = objs.objects
    sx = plan.canvas.width / o["width"].to_numpy(float)
    sy = plan.canvas.height / o["height"].to_numpy(float)
    out = pd.DataFrame({"bbox_x0": o["bbox_x0"] * sx, "bbox_y0": o["bbox_y0"] * sy,
                        "bbox_x1": o["bbox_x1"] * sx, "bbox_y1": o["bbox_y1"] * sy, "label": o["label"]})
    if extra is not None:
        used = set(o.attrs.get("box_columns", ()))
        for n in plan.space.names:
            if n in extra.columns and n not in used:
                out[n] = extra[n].to_numpy()
    return out


@dataclass(frozen=True)
class Placed:
    """Objects and images with their splits. `images` has image_id, file, width, height, split,
    n_objects; `objects` adds object_split (the object's own) and split (its image's)."""

    objects: pd.DataFrame
    images: pd.DataFrame
    source: Objects
    assignment: Assignment
    mixed_rule: str
    splits: tuple[str, ...]  # the split names written out, in the spec's order

    def table(self, replace: bool = False) -> pd.DataFrame:
        """A table input with `split` (its image's split) and `object_split` (the row's own)."""
        df = self.source.raw.copy()
        check_no_split_column(df, replace, str(self.source.path))
        df[SPLIT_COLUMN] = self.objects[SPLIT_COLUMN].to_numpy()
        df[OBJECT_SPLIT] = self.objects[OBJECT_SPLIT].to_numpy()
        return df

    def summary(self) -> list[str]:
        """The counts the command prints: images and objects per split, mixed images, outside rows."""
        img = self.images["split"].value_counts()
        obj = self.objects[OBJECT_SPLIT].value_counts()
        lines = ["images: " + ", ".join(f"{k} {int(v)}" for k, v in img.items()),
                 "objects: " + ", ".join(f"{k} {int(v)}" for k, v in obj.items())
                 + f"; {self.assignment.ambiguous} held by more than one split"]
        n_mixed = int(self.images["mixed"].sum())
        if n_mixed:
            what = {"drop": "dropped", "keep": f"kept in split '{MIXED}'", "largest": "given their largest object's split"}
            lines.append(f"{n_mixed} images have objects in different splits: {what[self.mixed_rule]} (--mixed {self.mixed_rule})")
        lines += outside_lines(self.assignment, self.objects["image_id"].to_numpy())
        return lines


@dataclass(frozen=True)
class TableSplit:
    """A table of parameters (one row per object, no boxes) with its split column."""

    table: pd.DataFrame
    assignment: Assignment

    def summary(self) -> list[str]:
        res = self.assignment
        lines = ["rows: " + ", ".join(f"{k} {v}" for k, v in sorted(res.counts.items()))
                 + f"; {res.ambiguous} held by more than one split"]
        return lines + outside_lines(res, np.arange(len(res.table)), "rows", "rows")


def check_no_split_column(df: pd.DataFrame, replace: bool, where: str) -> None:
    """Refuse, before any work, a table that already has a column assign would write."""
    clash = [c for c in (SPLIT_COLUMN, OBJECT_SPLIT) if c in df.columns]
    if clash and not replace:
        raise DatasetError(f"the table already has a {clash[0]!r} column; pass --replace-split to replace it",
                           where=where)


def split_input(spec_path, path, fmt: str = "auto", ref_size: float | None = None, mixed: str = "drop",
                boxes: BoxOptions = BoxOptions(), images_root=None, replace_split: bool = False) -> "Placed | TableSplit":
    """Open the spec (it may leave out objects) and the input, and split the input by placement."""
    from ..build import open_spec

    plan = open_spec(spec_path, for_data=True).plan
    src = open_objects(path, fmt, boxes, images_root, (plan.canvas.width, plan.canvas.height))
    if isinstance(src, pd.DataFrame):
        check_no_split_column(src, replace_split, str(path))
        res = assign(plan, src, ref_size=ref_size, where=str(path))
        return TableSplit(res.table, res)
    if src.kind == "table":
        check_no_split_column(src.raw, replace_split, str(path))
    return place(plan, src, ref_size, mixed)


def outside_lines(res: Assignment, ids, what: str = "objects", where: str = "images") -> list[str]:
    """One line counting and naming the rows that lie outside an axis's range ([] if none)."""
    if not res.outside:
        return []
    n = int((res.table[SPLIT_COLUMN] == OUTSIDE).sum())
    per = ", ".join(f"{k} {v}" for k, v in res.outside.items())
    first = ", ".join(str(ids[i]) for i in res.outside_rows)
    return [f"{n} {what} lie outside the spec's axis ranges ({per}), labelled '{OUTSIDE}'; e.g. {where} {first}"]


def place(plan, objs: Objects, ref_size: float | None = None, mixed: str = "drop") -> Placed:
    """Label every object by region, then every image by the mixed-image rule."""
    if mixed not in MIXED_RULES:
        raise DatasetError(f"unknown rule {mixed!r} (use {', '.join(MIXED_RULES)})", where="--mixed")
    extra = objs.raw if isinstance(objs.raw, pd.DataFrame) else None
    res = assign(plan, canvas_table(objs, plan, extra), ref_size=ref_size, where=str(objs.path))
    o = objs.objects.copy()
    o[OBJECT_SPLIT] = res.table[SPLIT_COLUMN].to_numpy()
    area = ((o["bbox_x1"] - o["bbox_x0"]) * (o["bbox_y1"] - o["bbox_y0"])).to_numpy()
    per_image = {}
    order = np.argsort(-area, kind="stable")  # largest first
    for i in order:
        per_image.setdefault(o["image_id"].iat[i], []).append(o[OBJECT_SPLIT].iat[i])
    split, is_mixed, count = [], [], []
    for iid in objs.images["image_id"]:
        labels = per_image.get(iid, [])
        kinds = set(labels)
        count.append(len(labels))
        is_mixed.append(len(kinds) > 1)
        if not labels:
            split.append(EMPTY)
        elif len(kinds) == 1 or mixed == "largest":
            split.append(labels[0])
        else:
            split.append(DROPPED if mixed == "drop" else MIXED)
    images = objs.images.copy()
    images["split"], images["n_objects"], images["mixed"] = split, count, is_mixed
    o[SPLIT_COLUMN] = o["image_id"].map(dict(zip(images["image_id"], images["split"]))).to_numpy()
    names = tuple(s.name for s in plan.splits) + ((MIXED,) if mixed == "keep" else ())
    return Placed(o, images, objs, res, mixed, names)
