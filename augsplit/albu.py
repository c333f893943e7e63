"""albumentations transforms that keep an online augmentation pipeline inside a split's region.

`RegionPlacement` puts an image's content (a photograph with its masks, boxes and keypoints)
on the spec's canvas at a position, scale, angle and mirror — and, by default, a colour —
drawn jointly from one split's region; `HeldOutPlacement` is its test-time form, drawing from
a held-out split; `RegionColour` applies the colour axes only. Draws can go to a ParamLog.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import albumentations as A
import cv2
import numpy as np

from .build import Built, open_mapping, open_spec
from .epoch import SharedEpoch
from .errors import DatasetError, SpecError
from .plan.draw import draw_online
from .plan.geometry import reach_of_cells
from .plan.guarantees import largest_shared_radius
from .plan.regions import CLASS
from .render import RenderParams, recolour_hsv, similarity_matrix
from .reprs import Shown, made_repr
from .space.axes import COLOUR_AXES, GEOMETRY_AXES
from .space.region import Region
from .space.streams import plugin_rng

ANCHORS = ("centre", "mask", "bbox")
BBOX_KEYS = ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1")
_MASS_TOL = 1e-12
_NOT_PLACED = ("index", "instance", "instance_seen")  # draw_online columns about the spec's own objects
BATCH = 64  # draws taken at once from a transform's generator


# ---- drawing from a split's region ---------------------------------------------------------


def _open(spec) -> tuple[Built, str | dict]:
    """The Built of `spec` and the form a transform keeps of it (and serializes): a spec file
    as its absolute path, so a pipeline saved with A.save loads from any working folder; a
    Built, or a spec already embedded, as the embedded spec ``{"spec": <canonical spec>,
    "base_dir": <absolute folder its relative paths resolve in>}``."""
    if isinstance(spec, Built):
        return spec, {"spec": json.loads(spec.plan.settings.canonical), "base_dir": str(Path(spec.base_dir).resolve())}
    if isinstance(spec, Mapping) and set(spec) == {"spec", "base_dir"}:
        return _open(open_mapping(spec["spec"], spec["base_dir"]))
    if isinstance(spec, (str, os.PathLike)):
        path = os.path.abspath(os.path.expanduser(os.fspath(spec)))
        return open_spec(path), path
    raise SpecError(f"spec must be a spec file path, a Built or an embedded spec {{'spec': ..., 'base_dir': ...}}, "
                    f"not {type(spec).__name__}", where="spec")


def _shown(spec, plan) -> str:
    """How a repr shows a spec: its file path, else its hash (an embedded spec is long)."""
    return spec if isinstance(spec, str) else Shown(f"<spec {plan.hash}>")


def _cylinder(region: Region, keep: set[str]) -> Region:
    """The region's projection onto the axes in `keep`, extended over every other axis."""
    sp = region.space
    free = np.array([n not in keep for n in sp.names])
    lo, hi = region.lo.copy(), region.hi.copy()
    lo[:, free], hi[:, free] = sp.t_lo[free], sp.t_hi[free]
    out = Region.empty(sp)
    for k in range(len(lo)):  # projected boxes may overlap: union them one by one
        out = out | Region(sp, lo[k:k + 1], hi[k:k + 1])
    return out


def _same(a: Region, b: Region) -> bool:
    return (a - b).mass() <= _MASS_TOL and (b - a).mass() <= _MASS_TOL


class RegionDraws:
    """Draws of one split's region for a transform: class, axes, canvas position and cell.

    `draw(u, c)` maps uniforms u (ndim + 2: one for the class, one for the box, one per axis)
    through the planner's own online draw (plan.draw.draw_online: the class in proportion to
    the split's per-class counts, then exact region sampling) — every draw lies in the region.
    """

    def __init__(self, built: Built, split: str):
        plan = built.plan
        self.plan = plan
        self.split = plan.split(split)  # SpecError listing the splits when unknown
        self.space = plan.space
        self.k = plan.space.ndim + 2
        counts = np.asarray(self.split.counts, dtype=float)
        share = np.cumsum(counts) / counts.sum()  # as draw_online turns a uniform into a class
        self.present = tuple(int(c) for c in np.flatnonzero(counts > 0))
        # the class-picking uniform that picks class c: the middle of its share
        self._middle = {c: (share[c] + (share[c - 1] if c else 0.0)) / 2.0 for c in self.present}
        self.class_regions = {c: self.split.class_region(c) for c in self.present}

    def __repr__(self) -> str:
        return made_repr(self, {"built": _shown(None, self.plan), "split": self.split.name},
                         positional=("built", "split"))

    def class_dependent(self) -> tuple[str, str] | None:
        """Two classes whose regions differ (beyond the class axis), or None."""
        if len(self.present) < 2:
            return None
        keep = set(self.space.names) - {CLASS}
        first = _cylinder(self.class_regions[self.present[0]], keep)
        for c in self.present[1:]:
            if not _same(first, _cylinder(self.class_regions[c], keep)):
                return self.plan.classes[self.present[0]], self.plan.classes[c]
        return None

    def separable(self, axes_a, axes_b) -> bool:
        """Whether the region is (projection on axes_a) x (projection on axes_b), class by class."""
        for c in self.present:
            part = self.class_regions[c]
            a = _cylinder(part, set(axes_a) | {CLASS})
            b = _cylinder(part, set(axes_b) | {CLASS})
            if ((a & b) - part).mass() > _MASS_TOL:
                return False
        return True

    def smallest_scale(self) -> float:
        if "scale" not in self.space:
            return 1.0
        ax = self.space["scale"]
        lo_t, _ = self.split.region.axis_extent("scale")
        return float(ax.from_t(lo_t + 0.5 if ax.measure == "levels" else lo_t))

    def class_of(self, value) -> int:
        classes = self.plan.classes
        if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
            c = int(value)
        elif isinstance(value, str) and value in classes:
            c = classes.index(value)
        else:
            raise DatasetError(f"unknown class {value!r}; the spec's classes are {', '.join(classes)}",
                               where="class_key")
        if c not in self.present:
            names = ", ".join(classes[i] for i in self.present)
            raise DatasetError(f"class {classes[c] if 0 <= c < len(classes) else c!r} has no room in split "
                               f"'{self.split.name}' (its classes: {names})", where="class_key")
        return c

    def draw(self, u: np.ndarray, c: int | None = None) -> dict:
        """One draw from uniforms u (k,); class c, or chosen by u[0] when None."""
        return self.draw_many(np.asarray(u, dtype=float)[None, :], c)[0]

    def draw_many(self, u: np.ndarray, c: int | None = None) -> list[dict]:
        """Draws from uniforms u (n, k), vectorised, by plan.draw.draw_online (class c when given)."""
        u = np.asarray(u, dtype=float)
        if c is not None:
            u = u.copy()
            u[:, 0] = self._middle[int(c)]
        # draw_online's second uniform picks an object instance: the content is the caller's, so none
        cols = draw_online(self.plan, self.split, np.insert(u, 1, 0.0, axis=1))
        table = {k: v.tolist() for k, v in cols.items() if k not in _NOT_PLACED}
        return [dict(zip(table, row)) for row in zip(*table.values())]


# ---- pixel helpers -------------------------------------------------------------------------


def index_matrix(m: np.ndarray) -> np.ndarray:
    """A 2x3 affine between continuous coordinates (pixel centres at .5, as bboxes use) as the
    same map between pixel-index coordinates (centres at integers, as cv2.warpAffine and
    albumentations keypoints use): x_i' = A (x_i + 0.5) + t - 0.5."""
    out = np.array(m, dtype=np.float64, copy=True)
    out[:, 2] += 0.5 * (m[:, 0] + m[:, 1]) - 0.5
    return out


def warp(array: np.ndarray, matrix: np.ndarray, hw: tuple[int, int], interpolation: int, fill) -> np.ndarray:
    """cv2.warpAffine onto an (h, w) canvas, constant border `fill`; any channel count, bool ok."""
    h, w = hw
    if array.dtype == bool:
        return warp(array.view(np.uint8), matrix, hw, interpolation, fill).astype(bool)
    if array.ndim == 3 and array.shape[2] > 4:
        parts = [warp(array[..., i:i + 4], matrix, hw, interpolation, fill) for i in range(0, array.shape[2], 4)]
        return np.concatenate(parts, axis=2)
    border = tuple(fill) if isinstance(fill, (tuple, list)) else fill
    out = cv2.warpAffine(array, matrix, (w, h), flags=interpolation, borderMode=cv2.BORDER_CONSTANT,
                         borderValue=border)
    if array.ndim == 3 and out.ndim == 2:
        out = out[..., None]
    return out


def recolour(image: np.ndarray, hue: float, saturation: float, brightness: float) -> np.ndarray:
    """The renderer's colour axes (render.recolour_hsv: hue rotated in degrees, saturation and
    value multiplied and clipped to 1, in OpenCV float HSV) on a uint8 or float [0, 1] image.
    A grey image is recoloured as the RGB image of its grey, so only the brightness acts on it;
    channels past the third are left as they are."""
    if (hue % 360.0 == 0.0) and saturation == 1.0 and brightness == 1.0:
        return image
    is_u8 = image.dtype == np.uint8
    f = image.astype(np.float32) * np.float32(1 / 255) if is_u8 else image.astype(np.float32)
    grey = f.ndim == 2 or f.shape[2] == 1
    rgb = cv2.cvtColor(f.reshape(f.shape[:2]), cv2.COLOR_GRAY2RGB) if grey else np.ascontiguousarray(f[..., :3])
    out = recolour_hsv(cv2.cvtColor(rgb, cv2.COLOR_RGB2HSV), hue, saturation, brightness)
    if grey:
        out = out[..., 0].reshape(f.shape)
    elif f.shape[2] > 3:
        out = np.concatenate([out, f[..., 3:]], axis=2)
    if is_u8:
        return (out * np.float32(255) + np.float32(0.5)).astype(np.uint8)
    return out.astype(image.dtype, copy=False)


def move_points(points: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """(N, 2) points through a 2x3 affine."""
    return points @ matrix[:, :2].T + matrix[:, 2]


def move_bboxes(boxes: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """Pixel boxes (N, 4+) [x0, y0, x1, y1, ...] -> the axis-aligned boxes around their moved
    corners (extra columns kept)."""
    x0, y0, x1, y1 = boxes[:, 0], boxes[:, 1], boxes[:, 2], boxes[:, 3]
    corners = np.stack([np.stack([x0, y0], 1), np.stack([x1, y0], 1), np.stack([x1, y1], 1),
                        np.stack([x0, y1], 1)], axis=1)  # (N, 4, 2)
    moved = corners @ matrix[:, :2].T + matrix[:, 2]
    out = np.array(boxes, dtype=np.float64, copy=True)
    out[:, 0:2] = moved.min(axis=1)
    out[:, 2:4] = moved.max(axis=1)
    return out


def corner_radius(anchor: tuple[float, float], hw: tuple[int, int]) -> float:
    """Farthest distance from `anchor` to a corner of the content grown by half a pixel (the
    reach of bilinear sampling, as Sprite.support_radius), continuous coordinates."""
    h, w = hw  # the farthest point of a rectangle is one of its corner pixels' corners
    return reach_of_cells((0, 0, h - 1, h - 1), (0, w - 1, 0, w - 1), anchor, grow=0.5)


def content_box(matrix: np.ndarray, hw: tuple[int, int], canvas_hw: tuple[int, int]) -> tuple[int, int, int, int]:
    """The canvas pixels (x0, y0, x1, y1, end exclusive; zeros if none) the placed content of
    size hw can touch: the box around its moved corners, out to whole pixels, clipped."""
    h, w = hw
    box = move_bboxes(np.array([[0.0, 0.0, w, h]]), matrix)[0]
    x0, y0 = max(math.floor(box[0]), 0), max(math.floor(box[1]), 0)
    x1, y1 = min(math.ceil(box[2]), canvas_hw[1]), min(math.ceil(box[3]), canvas_hw[0])
    return (x0, y0, x1, y1) if x1 > x0 and y1 > y0 else (0, 0, 0, 0)


# ---- the transforms ------------------------------------------------------------------------


def _item_number(value, key: str) -> int:
    """An item number as a data dict holds it: a whole number >= 0 (an int, a numpy or torch
    integer, or a float without a fraction); anything else is one line naming the key."""
    try:
        item = int(value)
        ok = not isinstance(value, (bool, str, bytes)) and item == value and item >= 0
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise DatasetError(f"the item number under {key!r} must be a whole number >= 0, got {value!r}",
                           where=f"data[{key!r}]")
    return item


INTERPOLATIONS = {cv2.INTER_NEAREST, cv2.INTER_LINEAR, cv2.INTER_CUBIC, cv2.INTER_AREA, cv2.INTER_LANCZOS4}


def _whole_sizes(value, where: str) -> tuple[int, int]:
    """(width, height): two finite whole numbers > 0 (a string is not a pair of numbers)."""
    try:
        if isinstance(value, (str, bytes)):
            raise TypeError
        cw, ch = value
        out = []
        for v in (cw, ch):
            if isinstance(v, bool) or not math.isfinite(float(v)) or float(v) != int(v) or int(v) <= 0:
                raise ValueError
            out.append(int(v))
    except (TypeError, ValueError, OverflowError):
        raise SpecError(f"content_size is (width, height): two whole numbers of px > 0, got {value!r}",
                        where=where) from None
    return out[0], out[1]


def _fill(value, where: str):
    """A border value: a number or a sequence of numbers (one per channel), all finite."""
    vals = value if isinstance(value, (list, tuple, np.ndarray)) else [value]
    try:
        ok = len(vals) > 0 and all(not isinstance(v, (bool, str, bytes)) and math.isfinite(float(v)) for v in vals)
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        raise SpecError(f"a fill is a number or one number per channel, got {value!r}", where=where)
    return value


def _probability(p, name: str) -> float:
    if isinstance(p, bool) or not isinstance(p, (int, float)) or not 0.0 <= float(p) <= 1.0:
        raise SpecError(f"p is a probability in [0, 1], got {p!r}", where=f"{name}.p")
    return float(p)


class _RegionTransform:
    """What the plugin transforms share: spec, split, draws, per-item streams, the log."""

    source_name = "RegionTransform"

    def _setup(self, spec, split, held_out: bool, class_key, item_key, log, epoch) -> None:
        name = type(self).__name__
        for key, value in (("class_key", class_key), ("item_key", item_key)):
            if value is not None and not isinstance(value, str):
                raise SpecError(f"{key} names a key of the data dict (a string), got {value!r}", where=f"{name}.{key}")
        if log is not None and not callable(getattr(log, "record", None)):
            raise SpecError(f"log is a parameter log (augsplit.ParamLog) or None, got {log!r}", where=f"{name}.log")
        self._built, self.spec = _open(spec)
        self.split = split
        self.held_out = bool(held_out)
        self.class_key = class_key
        self.item_key = item_key
        self.log = log
        self._epoch = SharedEpoch(epoch, where=f"{type(self).__name__}.epoch")
        self._draws = RegionDraws(self._built, split)
        sp = self._draws.split
        where = f"splits.{sp.name}"
        if self.held_out and sp.role != "test":
            raise SpecError(f"split '{sp.name}' is a training split; a test-time transform draws from a held-out "
                            "split", where=where, hint=f"held-out splits: {self._names('test')}")
        if not self.held_out and sp.role != "train":
            raise SpecError(f"split '{sp.name}' is held out ({sp.kind}); drawing training augmentations from it "
                            "leaks it into training", where=where,
                            hint=f"use HeldOutPlacement / held_out=True at test time; training splits: {self._names('train')}")
        if class_key is None:
            pair = self._draws.class_dependent()
            if pair is not None:
                raise SpecError(f"the region differs by class (e.g. '{pair[0]}' and '{pair[1]}'), so each item's "
                                "class must be known", where=f"{where}.region",
                                hint="pass class_key='<data key holding the class name or index>'")
        self._calls = 0
        self._pending: list[dict] = []

    def __repr__(self) -> str:
        args = {**self.get_transform_init_args(), "p": self.p}
        args["spec"] = _shown(self.spec, self._built.plan)
        return made_repr(self, args, positional=("spec", "split"))

    def _names(self, role: str) -> str:
        return ", ".join(s.name for s in self._built.plan.splits if s.role == role) or "none"

    def _require_separable(self, what: str) -> None:
        space = self._draws.space
        colour = [a for a in COLOUR_AXES if a in space]
        geometry = [a for a in GEOMETRY_AXES if a in space]
        if colour and geometry and not self._draws.separable(geometry, colour):
            raise SpecError(f"the region ties colour to position/size/angle, so {what} drawn on its own could "
                            "land outside it", where=f"splits.{self._draws.split.name}.region",
                            hint="use RegionPlacement with colour=True, which draws both together")

    @property
    def epoch(self) -> int:
        return self._epoch.value

    def set_epoch(self, epoch: int) -> None:
        """The epoch per-item streams and log rows belong to; seen by DataLoader workers
        already started from this process too (shared memory, as OnlineSampler.set_epoch)."""
        self._epoch.set(epoch, where=f"{type(self).__name__}.set_epoch")

    def _uniforms(self, data: dict) -> tuple[np.ndarray, int | None]:
        item = None
        if self.item_key is not None and self.item_key in data:
            item = _item_number(data[self.item_key], self.item_key)
            seed = self._built.plan.seed if self.seed is None else int(self.seed)
            return plugin_rng(seed, self._draws.split.index, self.epoch, item).random(self._draws.k), item
        return None, item

    def set_random_seed(self, seed: int | None) -> None:
        super().set_random_seed(seed)
        self._pending = []

    def set_random_state(self, random_generator, py_random) -> None:
        super().set_random_state(random_generator, py_random)
        self._pending = []

    def _draw(self, data: dict) -> dict:
        u, item = self._uniforms(data)
        c = None
        if self.class_key is not None:
            if self.class_key not in data:
                raise DatasetError(f"the data has no '{self.class_key}' (the class_key this transform was built "
                                   "with)", where=type(self).__name__)
            c = self._draws.class_of(data[self.class_key])
        if u is not None:
            values = self._draws.draw(u, c)
        elif c is not None:
            values = self._draws.draw(self.random_generator.random(self._draws.k), c)
        else:
            # from the transform's generator, BATCH draws at a time (vectorised sampling); the
            # sequence is fixed by the seed like any albumentations draw, and reseeding drops it
            if not self._pending:
                self._pending = self._draws.draw_many(self.random_generator.random((BATCH, self._draws.k)))[::-1]
            values = dict(self._pending.pop())
        if item is None:
            item = self._calls
        self._calls += 1
        values["_item"] = item
        return values

    def _record(self, values: dict, applied: tuple[str, ...]) -> None:
        if self.log is None:
            return
        row = {k: v for k, v in values.items() if k in applied or k in ("class_name", "class_index", "cell")}
        self.log.record(self._built.plan, self._draws.split.name, row, epoch=self.epoch, item=values["_item"],
                        source=self.source_name)

    def _check_declared(self, data: dict) -> None:
        for key, what, param in (("bboxes", "bboxes", "bbox_params=A.BboxParams(format=...)"),
                                 ("keypoints", "keypoints", "keypoint_params=A.KeypointParams(format=...)")):
            if data.get(key) is not None and len(data[key]) and self.get_processor(key) is None:
                raise DatasetError(f"{what} given without a declared format; run the transform inside "
                                   f"A.Compose([...], {param})", where=type(self).__name__)


class RegionPlacement(_RegionTransform, A.DualTransform):
    """Place the image's content on the spec's canvas at parameters drawn from a split's region.

    The content (the whole input image, with its masks, bboxes and keypoints) is mirrored
    left-right about its anchor, rotated counter-clockwise by `angle` and scaled by `scale`
    about it, and its anchor moved to the drawn position (cx_px, cy_px) of a canvas of the
    spec's width x height; pixels it does not cover get `fill` (`fill_mask` in masks). The
    anchor is the image centre (``anchor='centre'``), the centroid of the mask's non-zero
    pixels (``'mask'``) or the centre of the first bbox (``'bbox'``). With ``colour`` (default:
    whenever the spec varies hue, saturation or brightness) the colour axes are applied to the
    content too, drawn jointly with the geometry.

    Draws come from the transform's random generator (so ``A.Compose(seed=...)`` makes them
    reproducible), or — with ``item_key`` naming a data key that holds an item number —
    from that item's own stream ``SeedSequence(seed, spawn_key=(PLUGIN, split, epoch, item))``,
    the same in any worker and order. (Forked DataLoader workers inherit one generator state,
    as with every albumentations transform: without item_key, reseed each worker in a
    worker_init_fn or the workers repeat each other's draws.) What was applied is in ``get_applied_params()`` (and
    so in Compose's ``applied_transforms`` with ``save_applied_params=True``) under
    ``'placement'``, in the result under ``params_key`` when given, and in ``log``.

    Saved and reloaded like any albumentations transform (``A.to_dict``/``A.from_dict``,
    ``A.save``/``A.load`` as JSON or YAML, pickle, ``A.ReplayCompose``; import augsplit.albu
    before loading). ``spec`` is kept as the spec file's absolute path, so the pipeline loads
    from any working folder (while the file is there); a ``Built`` is kept as the spec itself,
    embedded (``{"spec": ..., "base_dir": ...}``, which ``spec`` also accepts). The ``log`` is
    not saved: give the reloaded transform its own (a replay, which repeats a draw, logs nothing).

    Refused at construction (SpecError): an unknown split; a held-out split (use
    HeldOutPlacement); content of ``content_size`` (width, height) larger than the canvas at
    the region's smallest scale; a region that differs by class without ``class_key``; with
    ``colour=False``, a region that ties colour to geometry; and (``check_footprint``) content
    too large to keep a footprint guarantee of the spec that names this split — the planner's
    proof redone with the content's radius in place of the objects'. With a mask or bbox
    anchor the radius is only known per item: an item that would break the guarantee raises
    DatasetError (the bound is ``self.max_radius`` px from the anchor).
    """

    source_name = "RegionPlacement"

    def __init__(self, spec, split: str, content_size: tuple[int, int], anchor: str = "centre",
                 colour: bool | None = None, class_key: str | None = None, item_key: str | None = None,
                 interpolation: int = cv2.INTER_LINEAR, mask_interpolation: int = cv2.INTER_NEAREST,
                 fill=0, fill_mask=0, log=None, epoch: int = 0, params_key: str | None = None,
                 check_footprint: bool = True, held_out: bool = False, p: float = 1.0):
        A.DualTransform.__init__(self, p=_probability(p, type(self).__name__))
        self._setup(spec, split, held_out, class_key, item_key, log, epoch)
        if anchor not in ANCHORS:
            raise SpecError(f"anchor must be one of {', '.join(ANCHORS)}, got {anchor!r}", where=f"{type(self).__name__}.anchor")
        name = type(self).__name__
        cw, ch = _whole_sizes(content_size, f"{name}.content_size")
        for key, flag in (("interpolation", interpolation), ("mask_interpolation", mask_interpolation)):
            if isinstance(flag, bool) or flag not in INTERPOLATIONS:
                raise SpecError(f"{key} is one of OpenCV's INTER_NEAREST, INTER_LINEAR, INTER_CUBIC, INTER_AREA or "
                                f"INTER_LANCZOS4 ({', '.join(map(str, sorted(INTERPOLATIONS)))}), got {flag!r}",
                                where=f"{name}.{key}")
        _fill(fill, f"{name}.fill")
        _fill(fill_mask, f"{name}.fill_mask")
        self.content_size = (cw, ch)
        self.anchor = anchor
        space = self._draws.space
        self.colour = any(a in space for a in COLOUR_AXES) if colour is None else bool(colour)
        if not self.colour:
            self._require_separable("the placement")
        self.interpolation = interpolation
        self.mask_interpolation = mask_interpolation
        self.fill = fill
        self.fill_mask = fill_mask
        self.params_key = params_key
        canvas = self._built.plan.canvas
        self.canvas_hw = (canvas.height, canvas.width)
        s = self._draws.smallest_scale()
        if cw * s > canvas.width or ch * s > canvas.height:
            raise SpecError(f"content of {cw}x{ch} px is {cw * s:.1f}x{ch * s:.1f} px at the region's smallest "
                            f"scale {s:g}, larger than the {canvas.width}x{canvas.height} canvas: it cannot be "
                            "placed whole anywhere in this region", where=f"splits.{self._draws.split.name}.region",
                            hint=f"shrink the content first (e.g. A.LongestMaxSize({int(min(canvas.width, canvas.height) / s)})) "
                                 "or raise the canvas / lower the scale range")
        self.check_footprint = bool(check_footprint)
        self.max_radius, self._limit = math.inf, None
        if self.check_footprint:
            self._footprint_limit(cw, ch)
        self._applied_axes = GEOMETRY_AXES + ("cx_px", "cy_px") + BBOX_KEYS + (COLOUR_AXES if self.colour else ())

    def _footprint_limit(self, cw: int, ch: int) -> None:
        """Carry the spec's footprint guarantees over to this content: the largest distance from
        the anchor the (bilinear) content may reach so every guarantee naming this split still
        holds when the content, not the spec's objects, is placed on both sides — the planner's
        own disc bound solved for the radius (plan.guarantees.largest_shared_radius). Refuses
        content whose centred radius already breaks it."""
        plan = self._built.plan
        r0 = corner_radius((cw / 2.0, ch / 2.0), (ch, cw))
        for gi, g in enumerate(plan.settings.claims):
            if g.disjoint != "footprint" or self.split not in g.between:
                continue
            a, b = (plan.split(name).region for name in g.between)
            r_ok, gap = largest_shared_radius(plan.space, plan.canvas, a, b, g.per_class)
            if r_ok < self.max_radius:
                self.max_radius, self._limit = r_ok, (gi, g.between, gap.gap_px)
        if r0 >= self.max_radius:
            gi, (sa, sb), gap = self._limit
            raise SpecError(f"the spec proves {sa} and {sb} footprint-disjoint for its own objects, but content of "
                            f"{cw}x{ch} px reaches {r0:.1f} px from its centre; with the regions {gap:.1f} px apart, "
                            f"content at their largest scales may reach {self.max_radius:.1f} px at most",
                            where=f"guarantees.{gi}",
                            hint=f"shrink the content below {2 * self.max_radius / math.sqrt(2) - 1:.0f} px square, or "
                                 "pass check_footprint=False (the audit will then show the overlap)")

    def _check_radius(self, anchor, hw) -> None:
        if self.max_radius == math.inf:
            return
        r = corner_radius(anchor, hw)
        if r >= self.max_radius:
            gi, (sa, sb), _ = self._limit
            raise DatasetError(f"placed about this anchor the content reaches {r:.1f} px from it, beyond the "
                               f"{self.max_radius:.1f} px that keeps {sa} and {sb} footprint-disjoint "
                               f"(guarantees.{gi})", where=type(self).__name__,
                               hint="use a smaller or better centred content, or check_footprint=False")

    @property
    def targets_as_params(self) -> list[str]:
        return {"mask": ["mask"], "bbox": ["bboxes"]}.get(self.anchor, [])

    def _anchor(self, data: dict, hw: tuple[int, int]) -> tuple[float, float]:
        h, w = hw
        if self.anchor == "centre":
            return w / 2.0, h / 2.0
        if self.anchor == "mask":
            mask = data.get("mask")
            if mask is None:
                raise DatasetError("anchor='mask' needs a mask with the image", where=type(self).__name__)
            m = np.asarray(mask)
            m = (m.any(axis=2) if m.ndim == 3 else m != 0).astype(np.uint8)
            mo = cv2.moments(m, binaryImage=True)
            if mo["m00"] == 0:
                raise DatasetError("anchor='mask' needs a mask with at least one non-zero pixel",
                                   where=type(self).__name__)
            # pixel (r, c) covers [c, c+1) x [r, r+1): its centre is at c + 0.5
            return mo["m10"] / mo["m00"] + 0.5, mo["m01"] / mo["m00"] + 0.5
        boxes = data.get("bboxes")
        if boxes is None or len(boxes) == 0:
            raise DatasetError("anchor='bbox' needs at least one bbox with the image", where=type(self).__name__)
        b = np.asarray(boxes, dtype=np.float64)[0]
        if self.get_processor("bboxes") is not None:  # inside Compose boxes arrive normalised
            b = b[:4] * np.array([w, h, w, h])
        return (b[0] + b[2]) / 2.0, (b[1] + b[3]) / 2.0

    def get_params_dependent_on_data(self, params: dict[str, Any], data: dict[str, Any]) -> dict[str, Any]:
        self._check_declared(data)
        hw = tuple(int(v) for v in params["shape"][:2])
        if min(hw) <= 0:
            raise DatasetError(f"the image is empty ({hw[1]}x{hw[0]} px)", where=type(self).__name__)
        cw, ch = self.content_size
        if hw[1] > cw or hw[0] > ch:
            raise DatasetError(f"the image is {hw[1]}x{hw[0]} px, larger than the content_size {cw}x{ch} the "
                               "transform was checked for", where=type(self).__name__)
        anchor = self._anchor(data, hw)
        self._check_radius(anchor, hw)
        values = self._draw(data)
        rp = RenderParams(values["cx_px"], values["cy_px"], values["scale"], values["angle"], bool(values["mirror"]))
        m = similarity_matrix(anchor, rp)
        values.update(zip(BBOX_KEYS, content_box(m, hw, self.canvas_hw)))
        self._record(values, self._applied_axes)
        placement = {k: v for k, v in values.items() if not k.startswith("_")}
        if not self.colour:
            for k in COLOUR_AXES:
                placement.pop(k, None)
        placement.update(split=self._draws.split.name, anchor_x=anchor[0], anchor_y=anchor[1])
        colour = (values["hue"], values["saturation"], values["brightness"]) if self.colour else None
        return {"placement": placement, "matrix": index_matrix(m), "bbox_matrix": m,
                "output_shape": self.canvas_hw, "hsv_change": colour}

    def apply(self, img: np.ndarray, matrix: np.ndarray, output_shape, hsv_change=None, **params) -> np.ndarray:
        if hsv_change is not None:
            img = recolour(img, *hsv_change)
        return warp(img, matrix, output_shape, self.interpolation, self.fill)

    def apply_to_mask(self, mask: np.ndarray, matrix: np.ndarray, output_shape, **params) -> np.ndarray:
        return warp(mask, matrix, output_shape, self.mask_interpolation, self.fill_mask)

    def apply_to_bboxes(self, bboxes: np.ndarray, bbox_matrix: np.ndarray, output_shape, shape, **params) -> np.ndarray:
        if len(bboxes) == 0:
            return bboxes
        h, w = shape[:2]
        oh, ow = output_shape
        px = np.array(bboxes, dtype=np.float64, copy=True)
        px[:, [0, 2]] *= w
        px[:, [1, 3]] *= h
        moved = move_bboxes(px, bbox_matrix)
        # boxes wholly off the canvas are dropped, as albumentations' own geometric transforms do
        keep = (moved[:, 2] > 0) & (moved[:, 3] > 0) & (moved[:, 0] < ow) & (moved[:, 1] < oh)
        moved = moved[keep]
        moved[:, [0, 2]] /= ow
        moved[:, [1, 3]] /= oh
        return moved.astype(bboxes.dtype, copy=False)

    def apply_to_keypoints(self, keypoints: np.ndarray, matrix: np.ndarray, placement: dict, **params) -> np.ndarray:
        if len(keypoints) == 0:
            return keypoints
        out = np.array(keypoints, dtype=np.float64, copy=True)
        out[:, :2] = move_points(out[:, :2], matrix)
        if out.shape[1] > 3:  # albumentations keypoints: x, y, z, angle (rad), scale
            lin = matrix[:, :2]
            d = np.stack([np.cos(out[:, 3]), np.sin(out[:, 3])], axis=1) @ lin.T
            out[:, 3] = np.mod(np.arctan2(d[:, 1], d[:, 0]), 2 * math.pi)
        if out.shape[1] > 4:
            out[:, 4] *= placement["scale"]
        return out.astype(keypoints.dtype, copy=False)

    def apply_with_params(self, params: dict[str, Any], *args: Any, **kwargs: Any) -> dict[str, Any]:
        res = super().apply_with_params(params, *args, **kwargs)
        if self.params_key is not None:
            res[self.params_key] = dict(params["placement"])
        return res

    def get_transform_init_args_names(self) -> tuple[str, ...]:
        return ("spec", "split", "content_size", "anchor", "colour", "class_key", "item_key", "interpolation",
                "mask_interpolation", "fill", "fill_mask", "epoch", "params_key", "check_footprint", "held_out")


class HeldOutPlacement(RegionPlacement):
    """RegionPlacement at test time: draws from a held-out split (refuses a training split)
    and applies to every item (p = 1). Pass ``item_key`` so each test item gets the same
    placement in every evaluation run, whatever the worker or order."""

    source_name = "HeldOutPlacement"

    def __init__(self, spec, split: str, content_size: tuple[int, int], anchor: str = "centre",
                 colour: bool | None = None, class_key: str | None = None, item_key: str | None = None,
                 interpolation: int = cv2.INTER_LINEAR, mask_interpolation: int = cv2.INTER_NEAREST,
                 fill=0, fill_mask=0, log=None, epoch: int = 0, params_key: str | None = None,
                 check_footprint: bool = True, p: float = 1.0):
        if _probability(p, type(self).__name__) != 1.0:
            raise SpecError(f"a held-out placement applies to every test item, so p is 1, got {p!r}",
                            where=f"{type(self).__name__}.p",
                            hint="RegionPlacement(..., held_out=True, p=...) places only some items")
        super().__init__(spec, split, content_size, anchor, colour, class_key, item_key, interpolation,
                         mask_interpolation, fill, fill_mask, log, epoch, params_key, check_footprint,
                         held_out=True, p=1.0)

    def get_transform_init_args_names(self) -> tuple[str, ...]:
        return tuple(n for n in super().get_transform_init_args_names() if n != "held_out")


class RegionColour(_RegionTransform, A.ImageOnlyTransform):
    """Apply the colour axes (hue, saturation, brightness) drawn from a split's region to the
    image, as the renderer recolours objects (OpenCV float HSV). Refuses (SpecError) a region
    that ties colour to geometry — use RegionPlacement, which draws both together. Options
    as RegionPlacement; the applied values are under ``'colour'`` in the applied params."""

    source_name = "RegionColour"

    def __init__(self, spec, split: str, class_key: str | None = None, item_key: str | None = None,
                 log=None, epoch: int = 0, params_key: str | None = None, held_out: bool = False, p: float = 1.0):
        A.ImageOnlyTransform.__init__(self, p=_probability(p, type(self).__name__))
        self._setup(spec, split, held_out, class_key, item_key, log, epoch)
        self._require_separable("the colour")
        self.params_key = params_key

    def get_params_dependent_on_data(self, params: dict[str, Any], data: dict[str, Any]) -> dict[str, Any]:
        values = self._draw(data)
        self._record(values, COLOUR_AXES)
        colour = {k: values[k] for k in COLOUR_AXES}
        colour.update(split=self._draws.split.name, class_index=values["class_index"],
                      class_name=values["class_name"], cell=values["cell"])
        return {"colour": colour}

    def apply(self, img: np.ndarray, colour: dict, **params) -> np.ndarray:
        return recolour(img, colour["hue"], colour["saturation"], colour["brightness"])

    def apply_with_params(self, params: dict[str, Any], *args: Any, **kwargs: Any) -> dict[str, Any]:
        res = super().apply_with_params(params, *args, **kwargs)
        if self.params_key is not None:
            res[self.params_key] = dict(params["colour"])
        return res

    def get_transform_init_args_names(self) -> tuple[str, ...]:
        return ("spec", "split", "class_key", "item_key", "epoch", "params_key", "held_out")
