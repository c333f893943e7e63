"""YOLO label folders in: one text file per image, a line per object, `class cx cy w h` (box
centre and size as fractions of the image) or `class x y x y ...` (a polygon, fractions).

Layouts: ROOT/labels/... beside ROOT/images/... (the same sub-paths), or label files next to
their images. Class names come from ROOT/data.yaml (or dataset.yaml) `names:`, or from
classes.txt / obj.names (one per line); without them the label is the class number as written.
Image sizes are read from the image files' headers.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

from .. import limits as L
from ..errors import DatasetError
from .boxes import Objects, check_boxes, dataset_box, object_frame, read_file, to_px, to_xyxy
from .imagesize import IMAGE_SUFFIXES, image_size

NAME_FILES = ("classes.txt", "obj.names")
YAML_FILES = ("data.yaml", "dataset.yaml")
MAX_LABEL_BYTES = 64 << 20  # one label file; refuse anything larger before reading it


def is_yolo(path: Path) -> bool:
    p = Path(path)
    return p.is_dir() and ((p / "labels").is_dir() or p.name == "labels" or any(_flat_pairs(p)))


def read_yolo(path: str | Path) -> Objects:
    p = Path(path)
    if not p.is_dir():
        raise DatasetError("a YOLO dataset is a folder (with labels/ and images/)", where=str(p))
    root, labels_dir, images_dir = _layout(p)
    box = dataset_box(root)
    names = _class_names(box)
    pairs = _pairs(root, labels_dir, images_dir)
    if not pairs:
        raise DatasetError("no label files (*.txt) found", where=str(p))
    images, cols = [], {c: [] for c in ("image_id", "label", "object_id", "segmentation", "box")}
    for rel in sorted(pairs, key=str):
        lab, img = pairs[rel]
        if img is None:
            raise DatasetError("no image file with this name (looked for " + ", ".join(IMAGE_SUFFIXES) + ")",
                               where=str(images_dir / rel) if labels_dir is not None else str(lab))
        w, h = image_size(img, box)
        image_id = rel.as_posix()
        images.append((image_id, img.relative_to(root).as_posix(), w, h))
        if lab is not None:
            _add_objects(cols, box, lab, image_id, names, w, h)
    img_df = pd.DataFrame(images, columns=["image_id", "file", "width", "height"])
    n = len(cols["box"])
    size = img_df.set_index("image_id").loc[cols["image_id"], ["file", "width", "height"]] if n else None
    b = np.asarray(cols["box"], float).reshape(n, 4)
    wh = (size["width"].to_numpy(float), size["height"].to_numpy(float)) if n else (np.zeros(0), np.zeros(0))
    x0, y0, x1, y1 = to_px(b[:, 0], b[:, 1], b[:, 2], b[:, 3], "norm", *wh)
    rows = {k: v for k, v in cols.items() if k != "box"}
    rows.update(bbox_x0=x0, bbox_y0=y0, bbox_x1=x1, bbox_y1=y1)
    if n:
        rows.update(file=size["file"].tolist(), width=wh[0], height=wh[1])
    objects = object_frame(rows, n)
    check_boxes(objects, str(p))
    return Objects(objects, img_df, "yolo", p, root)


def _pairs(root: Path, labels_dir: Path | None, images_dir: Path | None) -> dict:
    """Sub-path without suffix -> (label file or None, image file or None)."""
    if labels_dir is None:
        return {lab.relative_to(root).with_suffix(""): (lab, img) for lab, img in _flat_pairs(root)}
    pairs = {}
    for lab in _files_under(labels_dir, root, lambda n: n.endswith(".txt")):
        rel = lab.relative_to(labels_dir).with_suffix("")
        pairs[rel] = (lab, _image_for(images_dir / rel))
    for img in _files_under(images_dir, root, lambda n: Path(n).suffix.lower() in IMAGE_SUFFIXES):
        pairs.setdefault(img.relative_to(images_dir).with_suffix(""), (None, img))  # no label file: no objects
    return pairs


def _add_objects(cols: dict[str, list], box, lab: Path, image_id: str, names: dict, w, h) -> None:
    """Append one label file's objects (boxes as fractions; polygons also in px) to `cols`."""
    for line_no, cls, coords in _lines(box, lab):
        cols["image_id"].append(image_id)
        cols["label"].append(names.get(cls, cls))
        cols["object_id"].append(line_no)
        if len(coords) == 4:
            cols["box"].append(to_xyxy(*coords, "cxcywh"))
            cols["segmentation"].append(None)
        else:
            xy = np.asarray(coords, float).reshape(-1, 2)
            cols["box"].append((xy[:, 0].min(), xy[:, 1].min(), xy[:, 0].max(), xy[:, 1].max()))
            cols["segmentation"].append([(xy * (w, h)).reshape(-1).tolist()])


def _layout(p: Path) -> tuple[Path, Path | None, Path | None]:
    """(root, labels folder, images folder); the folders are None for the flat layout."""
    if (p / "labels").is_dir():
        images = p / "images"
        if not images.is_dir():
            raise DatasetError("labels/ has no images/ folder beside it", where=str(p))
        return p, p / "labels", images
    if p.name == "labels" and (p.parent / "images").is_dir():
        return p.parent, p, p.parent / "images"
    return p, None, None


def _flat_pairs(folder: Path):
    """(label file, image) pairs lying side by side under `folder`."""
    for lab in _files_under(Path(folder), Path(folder), lambda n: n.endswith(".txt")):
        if lab.name in NAME_FILES:
            continue
        img = _image_for(lab.with_suffix(""))
        if img is not None:
            yield lab, img


def _files_under(folder: Path, root: Path, keep):
    """The files (and links to files) under `folder` whose name `keep` accepts, folder by
    folder in name order, following links to folders that lie inside the dataset folder `root`,
    each folder once; a link to a folder out of it is refused by name (augsplit reads only
    inside its folders). Lazy: detecting a YOLO folder stops at its first label file."""
    base = Path(root).resolve()
    seen: set[Path] = set()
    for dirpath, dirnames, filenames in os.walk(folder, followlinks=True):
        real = Path(dirpath).resolve()
        if not real.is_relative_to(base):
            raise DatasetError(f"is a link out of the dataset folder {base} (to {real}); augsplit reads only "
                               "inside the folders it is given", where=dirpath)
        if real in seen:  # a link back to a folder already read
            dirnames[:] = []
            continue
        seen.add(real)
        dirnames.sort()
        yield from (Path(dirpath) / n for n in sorted(filenames) if keep(n))


def _image_for(stem: Path) -> Path | None:
    for suf in IMAGE_SUFFIXES:
        for s in (suf, suf.upper()):
            q = stem.with_name(stem.name + s)
            if q.is_file() or q.is_symlink():  # a link is judged by the reader (read_file)
                return q
    return None


def _class_names(box) -> dict[str, str]:
    """Class number (as written) -> name, from data.yaml `names:` or a names file."""
    root = Path(box.root)
    for name in YAML_FILES:
        f = root / name
        if os.path.lexists(f):
            from ..spec import read_yaml

            data = read_yaml(f, _text(box, f, L.MAX_SPEC_BYTES, "YAML"))
            names = data.get("names") if isinstance(data, dict) else None
            if isinstance(names, list):
                return {str(i): str(v) for i, v in enumerate(names)}
            if isinstance(names, dict):
                return {str(k): str(v) for k, v in names.items()}
            raise DatasetError("names: is a list of class names (or a mapping number: name)", where=str(f))
    for name in NAME_FILES:
        f = root / name
        if os.path.lexists(f):
            lines = [s.strip() for s in _text(box, f, MAX_LABEL_BYTES, "names",
                                               "not a UTF-8 text file of class names, one per line").splitlines()]
            return {str(i): s for i, s in enumerate(x for x in lines if x)}
    return {}


def _text(box, f: Path, limit: int, what: str, not_text: str = "not a UTF-8 text file") -> str:
    """A text file of the dataset, read inside its folder (`read_file`)."""
    try:
        return read_file(box, f, limit, what).decode("utf-8")
    except UnicodeDecodeError:
        raise DatasetError(not_text, where=str(f)) from None


def _lines(box, lab: Path):
    """(line number, class as written, coordinates) of each object line of a label file."""
    where = str(lab)
    text = _text(box, lab, MAX_LABEL_BYTES, "label", "not a text file")
    for k, line in enumerate(text.splitlines(), start=1):
        parts = line.split()
        if not parts:
            continue
        at = f"{where}:{k}"
        try:
            coords = [float(v) for v in parts[1:]]
        except ValueError:
            raise DatasetError("a label line is 'class cx cy w h' or 'class x y x y ...' (numbers)", where=at) from None
        if not (len(coords) == 4 or (len(coords) >= 6 and len(coords) % 2 == 0)):
            raise DatasetError(f"{len(coords)} numbers after the class: expected 4 (a box) or an even number "
                               "of at least 6 (a polygon)", where=at)
        if not all(np.isfinite(coords)):
            raise DatasetError("coordinates must be finite numbers", where=at)
        yield k, parts[0], coords
