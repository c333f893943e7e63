"""One image from one manifest row: background, target object, distractors.

Everything random about an image beyond its transform (background noise, distractors)
comes from the image's render stream, `image_rng(seed, split_index, index, RENDER)`, so the
image can be re-made from its manifest row alone, on any machine, in any order.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from .plan import Plan, SplitPlan
from .plan.draw import draw_placements
from .plan.geometry import reach
from .render import Placed, RenderParams, footprint, masks_overlap, render
from .space.axes import RENDER_PARAMS
from .space.streams import RENDER, lazy_image_rng

PARAM_KEYS = RENDER_PARAMS  # the pixel centre and every axis the renderer reads by name
SCENE_KEYS = ("index", "class_index", "instance", *PARAM_KEYS)  # all a scene reads of its row


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
    """Render the image of one row (a mapping with SCENE_KEYS: class_index, instance, index and
    PARAM_KEYS).

    `rng` replaces the row's render stream (online sampling passes a stream of its own, so a
    fresh draw never reuses the background of the generated image with the same index).
    The steps of `scene_batches` for one row, without its batching (a lazy loader's path)."""
    if rng is None:
        rng = _render_stream(plan, split, row)
    bg = background.draw(rng, plan.canvas.height, plan.canvas.width, plan.render.channels)
    return _scene(plan, source, split, row, bg, _first_draws(plan, split, [rng])[0])


def _render_stream(plan: Plan, split: SplitPlan, row):
    return lazy_image_rng(plan.seed, split.index, int(row["index"]), RENDER)


# The most background bytes `make_scenes` holds at once (each scene's background is drawn,
# from its stream, before the distractor draws that follow it in the stream).
SCENE_BATCH_BYTES = 4 << 20
SCENE_BATCH_ROWS = 64


def make_scenes(plan: Plan, source, background, split: SplitPlan, rows, rngs=None):
    """The Scene of each row, in order (see `make_scene`)."""
    for batch in scene_batches(plan, source, background, split, rows, rngs):
        yield from batch


def scene_batches(plan: Plan, source, background, split: SplitPlan, rows, rngs=None):
    """The Scenes of the rows, in order, a list of a few at a time (at most SCENE_BATCH_ROWS,
    and SCENE_BATCH_BYTES of pixels): the first distractor draws of a batch's scenes are mapped
    to placements in one draw_placements call (its cost is mostly per call, not per row), and
    a caller can take each later step (hashing, encoding, writing) over a whole batch while
    its code and data are hot."""
    h, w = plan.canvas.height, plan.canvas.width
    channels = plan.render.channels
    step = max(1, min(SCENE_BATCH_ROWS, SCENE_BATCH_BYTES // (h * w * channels)))
    rows = list(rows)
    for lo in range(0, len(rows), step):
        chunk = rows[lo:lo + step]
        if rngs is None:
            streams = [_render_stream(plan, split, r) for r in chunk]
        else:
            streams = list(rngs[lo:lo + step])
        bgs = [background.draw(rng, h, w, channels) for rng in streams]
        draws = _first_draws(plan, split, streams)
        yield [_scene(plan, source, split, row, bg, first) for row, bg, first in zip(chunk, bgs, draws)]


def _scene(plan: Plan, source, split: SplitPlan, row, bg: np.ndarray, draws) -> Scene:
    thr = plan.render.alpha_threshold
    target = (source.sprite(int(row["class_index"]), int(row["instance"])), render_params(row))
    placements = [target]
    extra: list[dict] = []
    for sp, rp, r in _distractors(plan, source, draws, target, bg.shape[:2], thr):
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
    batches: row j holds the same numbers as the j-th of one-row draws would, and nothing else
    in the scene draws from the stream afterwards. The first batch (as many rows as the scene
    wants distractors) is mapped together with other scenes' first batches (`_first_draws`);
    further batches, for refused attempts, one draw_placements call each."""

    def __init__(self, plan: Plan, split: SplitPlan, rng, want: int, first: list):
        self.plan, self.split, self.rng = plan, split, rng
        self.want, self.size, self.rows = want, 2 * max(want, 1), first[::-1]

    def next(self) -> dict:
        if not self.rows:
            u = self.rng.random((self.size, self.plan.space.ndim + 3))
            self.rows = _placement_rows(self.plan, self.split, u)[::-1]
            self.size *= 2  # rejections: draw further ahead next time
        return self.rows.pop()


def _placement_rows(plan: Plan, split: SplitPlan, u: np.ndarray) -> list[dict]:
    cols = draw_placements(plan, split, u)
    return [dict(zip(cols, vals)) for vals in zip(*(c.tolist() for c in cols.values()))]


def _first_draws(plan: Plan, split: SplitPlan, streams) -> list:
    """Each scene's _Draws (None when the spec has no distractors): the count drawn from its
    stream, then one row of uniforms per wanted distractor, all mapped in one call."""
    d = plan.render.distractors
    if d.count[1] <= 0:
        return [None] * len(streams)
    wants = [int(rng.integers(d.count[0], d.count[1] + 1)) for rng in streams]
    u = [rng.random((want, plan.space.ndim + 3)) for rng, want in zip(streams, wants) if want]
    rows = _placement_rows(plan, split, np.concatenate(u)) if u else []
    out, at = [], 0
    for rng, want in zip(streams, wants):
        out.append(_Draws(plan, split, rng, want, rows[at:at + want]))
        at += want
    return out


def _distractors(plan: Plan, source, draws: _Draws | None, target, hw, thr) -> list:
    """(sprite, RenderParams, drawn columns) of each distractor the scene gets: up to
    `attempts` draws per wanted distractor; with no_overlap, a draw whose footprint meets an
    earlier object's is dropped (footprints are made only then)."""
    if draws is None:
        return []
    d = plan.render.distractors
    taken = [footprint(target[0], target[1], hw, thr)] if d.no_overlap else None
    out = []
    for _ in range(draws.want):
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


@lru_cache(maxsize=4096)
def native_diameter(sprite, alpha_threshold: float) -> float:
    """Twice the largest distance from the anchor to a corner of a pixel above the threshold."""
    return 2.0 * reach(sprite.rgba[..., 3] > alpha_threshold * 255, sprite.anchor)
