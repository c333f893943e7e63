"""COCO JSON in: images, annotations (bbox [x, y, w, h] from the top-left, in px; polygons or
RLE masks) and categories -> the per-object table. The JSON itself is kept to write splits back."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import DatasetError
from .boxes import Objects, check_boxes, object_frame, to_xyxy

MAX_BYTES = 4 << 30  # a COCO file is read whole; refuse one larger than this before reading


def read_coco(path: str | Path, images_root: str | Path | None = None) -> Objects:
    """Read a COCO JSON file. Image files resolve against `images_root` (default: its folder)."""
    p = Path(path)
    where = str(p)
    data = _load(p, where)
    cats = _categories(data, where)
    root = Path(images_root) if images_root is not None else p.parent
    img = _image_table(data, root, where)
    by_id = {iid: i for i, iid in enumerate(img["image_id"])}
    cols, raw_box = _annotation_columns(data, by_id, cats, where)
    n = len(raw_box)
    b = np.asarray(raw_box, dtype=float).reshape(n, 4)
    x0, y0, x1, y1 = to_xyxy(b[:, 0], b[:, 1], b[:, 2], b[:, 3], "xywh")
    rows = dict(cols, bbox_x0=x0, bbox_y0=y0, bbox_x1=x1, bbox_y1=y1)
    pos = np.array([by_id[i] for i in cols["image_id"]], dtype=np.int64)
    for c in ("file", "width", "height"):
        rows[c] = img[c].to_numpy()[pos] if n else []
    objects = object_frame(rows, n)
    _boxes_from_masks(objects, where)
    check_boxes(objects, where)
    return Objects(objects, img, "coco", p, root, data)


def _load(p: Path, where: str) -> dict:
    """The file's JSON object, refused unless it has 'images' and 'annotations' lists."""
    if not p.is_file():
        raise DatasetError("no such file" if not p.exists() else "not a file", where=where)
    if p.stat().st_size > MAX_BYTES:
        raise DatasetError(f"the file is larger than {MAX_BYTES >> 30} GiB", where=where)
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DatasetError(f"not valid JSON: {exc}", where=where) from None
    except RecursionError:
        raise DatasetError("not a COCO file: its JSON is nested too deep to read", where=where) from None
    if not isinstance(data, dict) or not isinstance(data.get("images"), list) or not isinstance(data.get("annotations"), list):
        raise DatasetError("a COCO file is an object with 'images' and 'annotations' lists", where=where)
    return data


def _categories(data: dict, where: str) -> dict:
    """Category id -> name."""
    cats: dict = {}
    listed = data.get("categories") or []
    if not isinstance(listed, list):
        raise DatasetError(f"'categories' is a list, not {type(listed).__name__}", where=where)
    for k, c in enumerate(listed):
        at = f"{where} categories[{k}]"
        if not isinstance(c, dict) or "id" not in c:
            raise DatasetError("a category has an 'id' and a 'name'", where=at)
        cid = _id(c["id"], "the category's id", at)
        if cid in cats:
            raise DatasetError(f"category id {cid!r} appears twice", where=at)
        cats[cid] = str(c.get("name", cid))
    return cats


def coco_id(value):
    """An id as read: a float with an integer value (1.0, as tools that keep every number as a
    float write ids) is that integer, up to 2**53, the last integer a double holds exactly (IEEE
    754 binary64, from memory); anything else is returned as it is."""
    if isinstance(value, float) and value.is_integer() and abs(value) <= 2**53:
        return int(value)
    return value


def _id(value, what: str, where: str):
    """An id as COCO writes one: an integer or a string (a list, object or true/false is
    refused), integral floats read as their integers (`coco_id`); another float is refused, as
    no two writers would round it alike."""
    value = coco_id(value)
    if isinstance(value, bool) or not isinstance(value, (int, str)):
        raise DatasetError(f"{what} is {json.dumps(value)[:40]}, not an integer or a string", where=where)
    return value


def _number(value, what: str, where: str) -> float:
    """A finite JSON number (not true/false, not too large for a float)."""
    try:
        ok = not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(float(value))
    except OverflowError:
        ok = False
    if not ok:
        raise DatasetError(f"{what} is {json.dumps(value)[:40]}, not a finite number", where=where)
    return float(value)


def _image_table(data: dict, root: Path, where: str) -> pd.DataFrame:
    """One row per image (id, file, width, height); sizes the JSON lacks come from the files."""
    images = []
    for k, im in enumerate(data["images"]):
        at = f"{where} images[{k}]"
        if not isinstance(im, dict) or "id" not in im:
            raise DatasetError("an image has an 'id', 'file_name', 'width' and 'height'", where=at)
        size = [None if im.get(c) is None else _number(im[c], f"the image's {c}", at) for c in ("width", "height")]
        if any(v is not None and v <= 0 for v in size):
            raise DatasetError(f"the image's size {size[0]} x {size[1]} is not positive", where=at)
        images.append((_id(im["id"], "the image's id", at), str(im.get("file_name", "")), *size))
    img = pd.DataFrame(images, columns=["image_id", "file", "width", "height"])
    _sizes_from_files(img, root)
    if img["image_id"].duplicated().any():
        dup = img["image_id"][img["image_id"].duplicated()].iloc[0]
        raise DatasetError(f"image id {dup} appears twice", where=f"{where} images")
    return img


def _annotation_columns(data: dict, by_id: dict, cats: dict, where: str) -> tuple[dict[str, list], list]:
    """The annotations' columns and their raw [x, y, w, h] boxes (NaN where only a mask is given)."""
    cols: dict[str, list] = {c: [] for c in ("image_id", "label", "object_id", "segmentation")}
    raw_box = []
    for k, a in enumerate(data["annotations"]):
        at = f"{where} annotations[{k}]"
        if not isinstance(a, dict):
            raise DatasetError("an annotation is an object with 'image_id', 'category_id' and 'bbox'", where=at)
        image_id = _id(a.get("image_id"), "the annotation's image_id", at)
        if image_id not in by_id:
            raise DatasetError("the annotation's image_id is not among the images", where=at)
        box = a.get("bbox")
        seg = a.get("segmentation") or None
        if isinstance(box, list) and len(box) == 4:
            box = [_number(v, f"bbox[{i}]", at) for i, v in enumerate(box)]
        else:
            if seg is None:
                raise DatasetError("the annotation has neither a bbox [x, y, w, h] nor a segmentation", where=at)
            box = [np.nan] * 4  # taken from the mask below
        category_id = _id(a.get("category_id"), "the annotation's category_id", at)
        if category_id not in cats:
            raise DatasetError(f"category_id {a.get('category_id')!r} is not among the categories", where=at)
        cols["image_id"].append(image_id)
        cols["label"].append(cats[category_id])
        cols["object_id"].append(a.get("id", k))
        cols["segmentation"].append(seg)
        raw_box.append(box)
    return cols, raw_box


def _sizes_from_files(img: pd.DataFrame, root: Path) -> None:
    """Images the JSON gives no width or height for take them from their files' headers."""
    from .boxes import dataset_box, image_path
    from .imagesize import image_size

    box = dataset_box(Path(root).resolve())  # image_path resolves each name inside it
    w = pd.to_numeric(img["width"], errors="coerce")
    h = pd.to_numeric(img["height"], errors="coerce")
    for i in np.flatnonzero((w.isna() | h.isna()).to_numpy()):
        w.iat[i], h.iat[i] = image_size(image_path(root, img["file"].iat[i], f"image {img['image_id'].iat[i]}"), box)
    img["width"], img["height"] = w.astype(float), h.astype(float)


def _boxes_from_masks(objects: pd.DataFrame, where: str) -> None:
    """Annotations given only as masks get the box of their mask."""
    from .boxes import mask_bbox, segmentation_mask

    missing = np.flatnonzero(objects["bbox_x0"].isna().to_numpy())
    for i in missing:
        r = objects.iloc[i]
        m = segmentation_mask(r["segmentation"], int(r["height"]), int(r["width"]), f"{where} object {r['object_id']}")
        box = mask_bbox(m) if m is not None else None
        if box is not None:
            objects.iloc[i, [objects.columns.get_loc(c) for c in ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1")]] = box


def write_coco(data: dict, image_ids, path: str | Path) -> dict:
    """The COCO JSON restricted to `image_ids` (their annotations; every category), ids kept."""
    from ..io import write_text_atomic

    keep = set(image_ids)
    out = {k: v for k, v in data.items() if k not in ("images", "annotations")}
    out["images"] = [im for im in data["images"] if im["id"] in keep]
    out["annotations"] = [a for a in data["annotations"] if a["image_id"] in keep]
    write_text_atomic(path, json.dumps(out))
    return {"images": len(out["images"]), "annotations": len(out["annotations"])}
