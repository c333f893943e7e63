"""Pascal VOC XML folders in: one XML file per image (filename, size, and an `object` per
object with its `name` and `bndbox`). The image id is the XML file's stem, as VOC's image-set
lists name it. VOC box corners are 1-based pixel indices, both ends inclusive (VOC devkit
documentation, from memory): xmin = 1 is the image's first column.

Layouts: ROOT/Annotations/*.xml with images in ROOT/JPEGImages/, or a folder of XML files.
"""

from __future__ import annotations

import os
import xml.etree.ElementTree as ET
from pathlib import Path

import pandas as pd

from ..errors import DatasetError
from .boxes import Objects, check_boxes, dataset_box, object_frame, read_file

MAX_XML_BYTES = 16 << 20


def is_voc(path: Path) -> bool:
    p = Path(path)
    return p.is_dir() and ((p / "Annotations").is_dir() or any(p.glob("*.xml")))


def read_voc(path: str | Path) -> Objects:
    p = Path(path)
    if not p.is_dir():
        raise DatasetError("a VOC dataset is a folder of XML files (or one with Annotations/)", where=str(p))
    ann = p / "Annotations" if (p / "Annotations").is_dir() else p
    images_dir = p / "JPEGImages" if (p / "JPEGImages").is_dir() else ann
    files = sorted(ann.glob("*.xml"))
    if not files:
        raise DatasetError("no XML files found", where=str(ann))
    images, cols = [], {c: [] for c in ("image_id", "file", "width", "height", "label", "object_id",
                                        "bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1")}
    box = dataset_box(p)
    for f in files:
        image_id, name, w, h, objs = _parse(box, f)
        file = _image_file(p, images_dir, name, f) if name else ""
        images.append((image_id, file, w, h))
        for k, (label, (x0, y0, x1, y1)) in enumerate(objs):
            for c, v in zip(cols, (image_id, file, w, h, label, k, x0 - 1.0, y0 - 1.0, x1, y1)):
                cols[c].append(v)
    objects = object_frame(cols, len(cols["label"]))
    check_boxes(objects, str(ann))
    return Objects(objects, pd.DataFrame(images, columns=["image_id", "file", "width", "height"]), "voc", p, p)


def _image_file(root: Path, images_dir: Path, name: str, f: Path) -> str:
    """The image's path relative to the dataset folder, from the file name an XML gives;
    a name leading out of the folder (absolute, or through '..') is refused."""
    q = Path(os.path.normpath(images_dir / name))
    if not q.is_relative_to(root):
        raise DatasetError(f"<filename> {name!r} leads out of the dataset folder {root}; augsplit reads only "
                           "inside the folders it is given", where=str(f))
    return q.relative_to(root).as_posix()


def _parse(box, f: Path):
    where = str(f)
    data = read_file(box, f, MAX_XML_BYTES, "XML")
    try:
        root = ET.fromstring(data)
    except ET.ParseError as exc:
        raise DatasetError(f"not valid XML: {exc}", where=where) from None
    if root.tag != "annotation":
        raise DatasetError(f"the root element is <{root.tag}>, not <annotation>", where=where)
    size = root.find("size")
    w, h = (_number(size, k, where) if size is not None else None for k in ("width", "height"))
    if w is None or h is None or w <= 0 or h <= 0:
        raise DatasetError("<size> needs a positive <width> and <height>", where=where)
    objs = []
    for k, o in enumerate(root.findall("object")):
        at = f"{where} object {k}"
        name = (o.findtext("name") or "").strip()
        if not name:
            raise DatasetError("the object has no <name>", where=at)
        box = o.find("bndbox")
        if box is None:
            raise DatasetError("the object has no <bndbox>", where=at)
        corners = tuple(_number(box, c, at) for c in ("xmin", "ymin", "xmax", "ymax"))
        if any(v is None for v in corners):
            raise DatasetError("<bndbox> needs xmin, ymin, xmax and ymax", where=at)
        objs.append((name, corners))
    return f.stem, (root.findtext("filename") or "").strip(), w, h, objs


def _number(node, key: str, where: str) -> float | None:
    text = node.findtext(key)
    if text is None:
        return None
    try:
        return float(text)
    except ValueError:
        raise DatasetError(f"<{key}> is {text.strip()!r}, not a number", where=where) from None
