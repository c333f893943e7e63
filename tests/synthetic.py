"""Small synthetic datasets for the audit tests: polygon tiles of a few
classes on noisy backgrounds, split by position, with leaks that can be planted on purpose.

A camera looks down on a conveyor: training footage shows cut tiles in the left lane only,
test footage in the right lane. Every image, mask and manifest row is made here, in memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
import pandas as pd

from augsplit.audit.phash import content_hash

# Unit outlines of the tile classes (vertices about the centre, radius <= 1).
SHAPES = {
    "triangle": np.array([[0, -1], [0.87, 0.5], [-0.87, 0.5]]),
    "square": np.array([[-0.7, -0.7], [0.7, -0.7], [0.7, 0.7], [-0.7, 0.7]]),
    "ell": np.array([[-0.8, -1], [-0.2, -1], [-0.2, 0.4], [0.8, 0.4], [0.8, 1], [-0.8, 1]]),
    "chevron": np.array([[-1, -0.6], [0, 0.2], [1, -0.6], [1, 0.2], [0, 1], [-1, 0.2]]),
}


@dataclass(frozen=True)
class Synthetic:
    """A manifest table, its images and footprint masks (crops at each row's bbox)."""

    table: pd.DataFrame
    images: list
    masks: list

    def image_loader(self, row: int):
        return self.images[row]

    def mask_loader(self, row: int):
        return self.masks[row]


def polygon(shape: str, cx: float, cy: float, radius: float, angle_deg: float, instance: int = 0) -> np.ndarray:
    """Vertices (N, 2) in canvas pixels (x right, y down), rotated counter-clockwise on screen.
    Instances of a class differ by a small fixed stretch."""
    v = SHAPES[shape] * np.array([1.0 + 0.15 * instance, 1.0])
    a = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(a), np.sin(a)], [-np.sin(a), np.cos(a)]])
    return v @ rot.T * radius / (1.0 + 0.15 * instance) + np.array([cx, cy])


def render(params: dict, hw: tuple[int, int], rng: np.random.Generator, background: str = "noise"):
    """One image (H, W, 3) uint8 RGB and its footprint mask (H, W) bool."""
    h, w = hw
    if background == "noise":  # smooth noise: a fresh random texture in every image
        bg = cv2.GaussianBlur(rng.random((h, w)).astype(np.float32), (0, 0), 2.0)
        bg = (bg - bg.mean()) / (bg.std() + 1e-6) * 30 + 110
        img = np.repeat(np.clip(bg, 0, 255).astype(np.uint8)[..., None], 3, axis=2)
    else:
        img = np.full((h, w, 3), 110, np.uint8)
    pts = polygon(params["class_name"], params["cx_px"], params["cy_px"], 6.0 * params["scale"],
                  params["angle"], int(params["instance"]))
    mask = np.zeros((h, w), np.uint8)
    # fillPoly with 4 bits of sub-pixel precision: vertices at 1/16 px
    cv2.fillPoly(mask, [np.round((pts - 0.5) * 16).astype(np.int32)], 1, lineType=cv2.LINE_8, shift=4)
    hsv = np.uint8([[[int(params["hue"] / 2) % 180, 200, 220]]])
    colour = cv2.cvtColor(hsv, cv2.COLOR_HSV2RGB)[0, 0]
    img[mask > 0] = colour
    return img, mask > 0


def make_dataset(n_train: int = 160, n_test: int = 80, hw=(64, 64), seed: int = 0,
                 background: str = "noise", unseen_test_instance: bool = True) -> Synthetic:
    """Train tiles in the left lane (x in [8, 22] px), test tiles in the right lane (x in [42, 56]);
    tile radius <= 6 * 1.2 px, so no footprint of one lane reaches the other. Test rows use
    instance 1 of each class, declared unseen; training uses instance 0 only."""
    rng = np.random.default_rng(seed)
    rows, images, masks = [], [], []
    classes = list(SHAPES)
    for split, n, (xlo, xhi) in (("train", n_train, (8.0, 22.0)), ("test", n_test, (42.0, 56.0))):
        for i in range(n):
            cls = classes[i % len(classes)]
            inst = 1 if (split == "test" and unseen_test_instance) else 0
            p = {"image_id": f"{split}-{i:07d}", "split": split, "class_name": cls, "instance": inst,
                 "instance_seen": not (split == "test" and unseen_test_instance),
                 "x": float(rng.uniform(xlo, xhi)), "y": float(rng.uniform(10.0, hw[0] - 10.0)),
                 "scale": float(np.exp(rng.uniform(np.log(0.8), np.log(1.2)))),
                 "angle": float(rng.uniform(0, 360)), "hue": float(rng.uniform(0, 360))}
            rows.append(p)
    table = pd.DataFrame(rows)
    table["cx_px"] = table["x"]; table["cy_px"] = table["y"]
    table["width"] = hw[1]; table["height"] = hw[0]
    for r in range(len(table)):
        img, m = render(table.iloc[r].to_dict(), hw, rng, background)
        images.append(img); masks.append(m)
    return _finish(table, images, masks)


def _finish(table: pd.DataFrame, images: list, full_masks: list) -> Synthetic:
    """Bboxes, cropped masks and content hashes from the rendered images."""
    boxes, crops = [], []
    for m in full_masks:
        ys, xs = np.nonzero(m)
        b = (int(xs.min()), int(ys.min()), int(xs.max()) + 1, int(ys.max()) + 1) if len(xs) else (0, 0, 0, 0)
        boxes.append(b); crops.append(m[b[1]:b[3], b[0]:b[2]])
    t = table.copy()
    t[["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]] = np.array(boxes, dtype=np.int64)
    t["footprint_px"] = [int(m.sum()) for m in full_masks]
    t["sha256"] = [content_hash(im) for im in images]
    return Synthetic(t.reset_index(drop=True), list(images), crops)


def plant(ds: Synthetic, kind: str, row: int | None = None, seed: int = 1) -> tuple[Synthetic, int]:
    """A copy of the dataset with one leak planted; returns it and the affected row.

    kinds: "copy" (a test image replaced by a train image), "shift" (by a train image moved
    1 px right), "moved" (a train row re-drawn inside the test lane), "instance" (a train row
    given the unseen test instance of its class).
    """
    rng = np.random.default_rng(seed)
    t = ds.table.copy()
    images = list(ds.images)
    full = [_uncrop(m, b, (int(t["height"].iloc[0]), int(t["width"].iloc[0])))
            for m, b in zip(ds.masks, t[["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]].to_numpy())]
    train = np.flatnonzero(t["split"] == "train"); test = np.flatnonzero(t["split"] == "test")
    if kind in ("copy", "shift"):
        dst = int(test[0] if row is None else row)
        src = int(train[0])
        img, m = images[src].copy(), full[src].copy()
        if kind == "shift":
            img = np.roll(img, 1, axis=1); img[:, 0] = img[:, 1]
            m = np.roll(m, 1, axis=1); m[:, 0] = False
        images[dst] = img; full[dst] = m
        return _finish(t, images, full), dst
    if kind == "moved":
        dst = int(train[0] if row is None else row)
        t.loc[dst, ["x", "cx_px"]] = float(rng.uniform(42.0, 56.0))
        hw = (int(t["height"].iloc[0]), int(t["width"].iloc[0]))
        images[dst], full[dst] = render(t.iloc[dst].to_dict(), hw, rng)
        return _finish(t, images, full), dst
    if kind == "instance":
        dst = int(train[0] if row is None else row)
        t.loc[dst, "instance"] = int(t.loc[test[t.loc[test, "class_name"].to_numpy() == t.loc[dst, "class_name"]][0], "instance"])
        return _finish(t, images, full), dst
    raise ValueError(f"unknown leak kind {kind!r}")


def _uncrop(crop, box, hw) -> np.ndarray:
    m = np.zeros(hw, bool)
    x0, y0, x1, y1 = (int(v) for v in box)
    m[y0:y1, x0:x1] = crop
    return m


AXES = {"x": (0.0, 64.0, False), "y": (0.0, 64.0, False), "scale": (0.8, 1.2, False, "log"),
        "angle": (0.0, 360.0, True), "hue": (0.0, 360.0, True)}
