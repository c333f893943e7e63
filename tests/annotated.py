"""Test helpers: write a generated dataset's rows out as the annotated formats users have
(COCO JSON with RLE masks and polygons, YOLO label folders, Pascal VOC XML), optionally with
some images resized, so the readers can be checked against the manifest's own truth."""

from __future__ import annotations

import json
from pathlib import Path

import cv2
import numpy as np
import pandas as pd

from augsplit.dataset import open_dataset
from augsplit.render import footprint
from augsplit.scene import render_params


def full_masks(root: Path, df: pd.DataFrame) -> list[np.ndarray]:
    """Each row's object mask over its whole canvas, re-rendered from the manifest row."""
    built = open_dataset(root).built
    hw = (built.spec.canvas.height, built.spec.canvas.width)
    out = []
    for _, row in df.iterrows():
        m = footprint(built.source.sprite(int(row["class_index"]), int(row["instance"])), render_params(row), hw,
                      built.spec.render.alpha_threshold).mask
        full = np.zeros(hw, bool)
        x0, y0, x1, y1 = (int(row[c]) for c in ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"))
        cx0, cy0 = max(x0, 0), max(y0, 0)
        part = m[cy0 - y0: cy0 - y0 + min(y1, hw[0]) - cy0, cx0 - x0: cx0 - x0 + min(x1, hw[1]) - cx0]
        full[cy0: cy0 + part.shape[0], cx0: cx0 + part.shape[1]] = part
        out.append(full)
    return out


def pixel_polygons(mask: np.ndarray) -> list[list[float]]:
    """Outer contours of a mask as COCO polygons (px) that keep every mask pixel's centre inside
    and every other centre outside: traced on the mask doubled in size, so each vertex lies a
    quarter pixel inside the mask's edge (OpenCV contours run through boundary pixel centres)."""
    big = cv2.resize(mask.astype(np.uint8), None, fx=2, fy=2, interpolation=cv2.INTER_NEAREST)
    contours, _ = cv2.findContours(big, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    return [((c.reshape(-1, 2) + 0.5) / 2.0).reshape(-1).tolist() for c in contours if len(c) >= 3]


def _image(root: Path, row, factor: int) -> np.ndarray:
    img = cv2.imread(str(root / row["file"]), cv2.IMREAD_UNCHANGED)
    return cv2.resize(img, None, fx=factor, fy=factor, interpolation=cv2.INTER_NEAREST) if factor != 1 else img


def _factor(k: int, upscale: int) -> int:
    """Every `upscale`-th image is written at twice its size (0: none)."""
    return 2 if upscale and k % upscale == 0 else 1


def write_coco(root: Path, df: pd.DataFrame, out: Path, names: dict | None = None, upscale: int = 0) -> Path:
    """COCO JSON at `out` (images copied beside it): even rows get an RLE mask (encoded with
    pycocotools), odd rows polygons from OpenCV contours. Image ids are 100 + row number."""
    import pycocotools.mask as cm

    out.parent.mkdir(parents=True, exist_ok=True)
    classes = sorted(df["class_name"].unique())
    cat = {c: i + 1 for i, c in enumerate(classes)}
    images, anns = [], []
    for k, ((_, row), mask) in enumerate(zip(df.iterrows(), full_masks(root, df))):
        f = _factor(k, upscale)
        img = _image(root, row, f)
        name = f"images/{row['image_id']}.png"
        (out.parent / "images").mkdir(exist_ok=True)
        cv2.imwrite(str(out.parent / name), img)
        images.append({"id": 100 + k, "file_name": name, "width": img.shape[1], "height": img.shape[0]})
        m = cv2.resize(mask.astype(np.uint8), None, fx=f, fy=f, interpolation=cv2.INTER_NEAREST) if f != 1 else mask.astype(np.uint8)
        ys, xs = np.nonzero(m)
        box = [float(xs.min()), float(ys.min()), float(xs.max() + 1 - xs.min()), float(ys.max() + 1 - ys.min())]
        if k % 2 == 0:
            rle = cm.encode(np.asfortranarray(m))
            seg = {"size": list(rle["size"]), "counts": rle["counts"].decode("ascii")}
        else:
            seg = pixel_polygons(m)
        anns.append({"id": 5000 + k, "image_id": 100 + k, "category_id": cat[row["class_name"]], "bbox": box,
                     "area": float(m.sum()), "iscrowd": 0, "segmentation": seg})
    cats = [{"id": i, "name": (names or {}).get(c, c)} for c, i in cat.items()]
    out.write_text(json.dumps({"info": {"description": "test"}, "images": images, "annotations": anns, "categories": cats}))
    return out


def write_yolo(root: Path, df: pd.DataFrame, out: Path, upscale: int = 0, polygons: bool = False) -> Path:
    """ROOT/images/<split>/<id>.png and ROOT/labels/<split>/<id>.txt (normalised cx cy w h, or
    a polygon from the mask's contour), and data.yaml naming the classes."""
    classes = sorted(df["class_name"].unique())
    masks = full_masks(root, df) if polygons else [None] * len(df)
    for k, ((_, row), mask) in enumerate(zip(df.iterrows(), masks)):
        f = _factor(k, upscale)
        img = _image(root, row, f)
        sub = "train" if k % 2 else "val"  # a folder name unrelated to the split
        for d in ("images", "labels"):
            (out / d / sub).mkdir(parents=True, exist_ok=True)
        cv2.imwrite(str(out / "images" / sub / f"{row['image_id']}.png"), img)
        w, h = row["width"], row["height"]
        c = classes.index(row["class_name"])
        if mask is not None:
            pts = np.reshape(max(pixel_polygons(mask), key=len), (-1, 2))
            line = f"{c} " + " ".join(f"{x / w:.6f} {y / h:.6f}" for x, y in pts)
        else:
            x0, y0, x1, y1 = (float(row[k2]) for k2 in ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"))
            line = f"{c} {(x0 + x1) / 2 / w:.6f} {(y0 + y1) / 2 / h:.6f} {(x1 - x0) / w:.6f} {(y1 - y0) / h:.6f}"
        (out / "labels" / sub / f"{row['image_id']}.txt").write_text(line + "\n")
    (out / "data.yaml").write_text("names: [" + ", ".join(classes) + "]\n")
    return out


def write_voc(root: Path, df: pd.DataFrame, out: Path, upscale: int = 0) -> Path:
    """ROOT/Annotations/<id>.xml (1-based inclusive corners) and ROOT/JPEGImages/<id>.png."""
    (out / "Annotations").mkdir(parents=True, exist_ok=True)
    (out / "JPEGImages").mkdir(parents=True, exist_ok=True)
    for k, (_, row) in enumerate(df.iterrows()):
        f = _factor(k, upscale)
        img = _image(root, row, f)
        cv2.imwrite(str(out / "JPEGImages" / f"{row['image_id']}.png"), img)
        x0, y0, x1, y1 = (int(row[c]) * f for c in ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"))
        xml = (f"<annotation><filename>{row['image_id']}.png</filename><size><width>{img.shape[1]}</width>"
               f"<height>{img.shape[0]}</height><depth>3</depth></size><object><name>{row['class_name']}</name>"
               f"<bndbox><xmin>{x0 + 1}</xmin><ymin>{y0 + 1}</ymin><xmax>{x1}</xmax><ymax>{y1}</ymax></bndbox>"
               f"</object></annotation>")
        (out / "Annotations" / f"{row['image_id']}.xml").write_text(xml)
    return out
