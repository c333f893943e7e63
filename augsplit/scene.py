"""One image from one manifest row: background, target object, distractors.

Everything random about an image beyond its transform (background noise, distractors)
comes from the image's render stream, `image_rng(seed, split_index, index, RENDER)`, so the
image can be re-made from its manifest row alone, on any machine, in any order.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from .plan import Plan, SplitPlan
from .plan.draw import draw_placements
from .plan.geometry import reach
from .render import Placed, RenderParams, footprint, masks_overlap, render
from .space.axes import RENDER_PARAMS
from .space.sample import RENDER, lazy_image_rng

PARAM_KEYS = RENDER_PARAMS  # the pixel centre and every axis the renderer reads by name


@dataclass(frozen=True, eq=False)
class Scene:
    image: np.ndarray  # (H, W, C) uint8, RGB or grey
    target: Placed
    distractors: list  # dicts of distractor columns (see manifest.DISTRACTOR_COLUMNS)
    distractor_placed: list


def render_params(row) -> RenderParams:
    return RenderParams(float(row["cx_px"]), float(row["cy_px"]), float(row["scale"]), float(row["angle"]),
                        bool(row["mirror"]), float(row["hue"]), float(row["saturation"]), float(row["brightness"]))


def make_scene(plan: Plan, source, background, split: SplitPlan, row, rng: np.random.Generator | None = None) -> Scene:
    """Render the image of one row (a mapping with class_index, instance, index and PARAM_KEYS).

    `rng` replaces the row's render stream (online sampling passes a stream of its own, so a
    fresh draw never reuses the background of the generated image with the same index)."""
    h, w = plan.canvas.height, plan.canvas.width
    channels = plan.render.channels
    thr = plan.render.alpha_threshold
    if rng is None:
        rng = lazy_image_rng(plan.seed, split.index, int(row["index"]), RENDER)
    bg = background.draw(rng, h, w, channels)
    target = (source.sprite(int(row["class_index"]), int(row["instance"])), render_params(row))
    placements = [target]
    extra: list[dict] = []
    for sp, rp, r in _distractors(plan, source, split, rng, target, (h, w), thr):
        placements.append((sp, rp))
        extra.append(r)
    image, placed = render(bg, placements, thr)
    rows = []
    for k, (r, p) in enumerate(zip(extra, placed[1:])):
        rows.append({"k": k, "class_name": r["class_name"], "class_index": int(r["class_index"]),
                     "instance": int(r["instance"]), **{key: r[key] for key in PARAM_KEYS},
                     **placed_columns(p)})
    return Scene(image, placed[0], rows, placed[1:])


class _Draws:
    """A scene's distractor draws, one row of uniforms each, taken from the render stream in
    batches (one draw_placements call per batch): row j holds the same numbers as the j-th of
    one-row draws would, and nothing else in the scene draws from the stream afterwards."""

    def __init__(self, plan: Plan, split: SplitPlan, rng: np.random.Generator, first: int):
        self.plan, self.split, self.rng = plan, split, rng
        self.size, self.rows = max(first, 1), []

    def next(self) -> dict:
        if not self.rows:
            u = self.rng.random((self.size, self.plan.space.ndim + 3))
            cols = draw_placements(self.plan, self.split, u)
            self.rows = [dict(zip(cols, vals)) for vals in zip(*(c.tolist() for c in cols.values()))][::-1]
            self.size *= 2  # rejections: draw further ahead next time
        return self.rows.pop()


def _distractors(plan: Plan, source, split: SplitPlan, rng: np.random.Generator, target, hw, thr) -> list:
    """(sprite, RenderParams, drawn columns) of each distractor the scene gets: a count drawn
    from the stream, then up to `attempts` draws per distractor; with no_overlap, a draw whose
    footprint meets an earlier object's is dropped (footprints are made only then)."""
    d = plan.render.distractors
    if d.count[1] <= 0:
        return []
    want = int(rng.integers(d.count[0], d.count[1] + 1))
    draws = _Draws(plan, split, rng, want)
    taken = [footprint(target[0], target[1], hw, thr)] if d.no_overlap else None
    out = []
    for _ in range(want):
        for _attempt in range(d.attempts):
            r = draws.next()
            sp, rp = source.sprite(int(r["class_index"]), int(r["instance"])), render_params(r)
            if taken is not None:
                fp = footprint(sp, rp, hw, thr)
                if any(masks_overlap(fp, t) for t in taken):
                    continue
                taken.append(fp)
            out.append((sp, rp, r))
            break
    return out


def placed_columns(p: Placed) -> dict:
    x0, y0, x1, y1 = p.bbox
    return {"bbox_x0": x0, "bbox_y0": y0, "bbox_x1": x1, "bbox_y1": y1,
            "footprint_px": p.footprint_px, "visible_fraction": p.visible_fraction}


def pixel_sha256(image: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(image).tobytes()).hexdigest()


@lru_cache(maxsize=4096)
def native_diameter(sprite, alpha_threshold: float) -> float:
    """Twice the largest distance from the anchor to a corner of a pixel above the threshold."""
    return 2.0 * reach(sprite.rgba[..., 3] > alpha_threshold * 255, sprite.anchor)
