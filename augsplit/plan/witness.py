"""Counterexamples for a refused footprint guarantee: two placements that share a pixel.

Starting from the closest points of the two position sets, each object is turned (within
its box's angle range) so that its farthest pixel points at the other, at the box's largest
scale, and both footprints are rendered. A shared pixel is a witness; none found means the
refusal rests only on the conservative bound (reported as 'unproven', not 'overlap').
"""

from __future__ import annotations

import math

import numpy as np

from ..space.axes import LEVELS, Space
from ..space.region import Region
from ..units import Canvas
from .geometry import box_max_scale


def _farthest_direction(sprite, flip: bool) -> float:
    """Screen angle (deg, counter-clockwise) from the anchor to the farthest opaque pixel."""
    a = sprite.rgba[..., 3]
    rows, cols = np.nonzero(a > 0)
    ax, ay = sprite.anchor
    dx, dy = cols + 0.5 - ax, rows + 0.5 - ay
    k = int(np.argmax(dx * dx + dy * dy))
    vx, vy = (-dx[k] if flip else dx[k]), dy[k]
    return math.degrees(math.atan2(-vy, vx))


def _allowed_angles(space: Space, region: Region, k: int, want: float) -> list[float]:
    """Angles of box k nearest to `want`, plus a few around it."""
    if "angle" not in space:
        return [0.0]
    ax = space["angle"]
    i = space.index["angle"]
    lo, hi = float(ax.from_t(region.lo[k, i])), float(ax.from_t(region.hi[k, i]))
    if ax.measure == LEVELS:
        return [v for j, v in enumerate(ax.levels) if region.lo[k, i] <= j <= region.hi[k, i]]
    out = []
    for d in (0.0, -3.0, 3.0, -8.0, 8.0):
        w = want + d
        cands = [w + s for s in (-720, -360, 0, 360, 720)]
        inside = [c for c in cands if lo <= c <= hi]
        if inside:
            out.append(inside[0])
        else:
            out.append(min((lo, hi), key=lambda e: min(abs(((e - c) + 180) % 360 - 180) for c in cands)))
    return list(dict.fromkeys(out))


def _mirrors(space: Space, region: Region, k: int) -> list[bool]:
    if "mirror" not in space:
        return [False]
    i = space.index["mirror"]
    return [bool(v) for j, v in enumerate(space["mirror"].levels) if region.lo[k, i] - 1e-9 <= j <= region.hi[k, i] + 1e-9]


def find_witness(space: Space, canvas: Canvas, A: Region, B: Region, gap, sprites_a, sprites_b,
                 footprint_at) -> dict | None:
    """Two placements, one per split, whose footprints share a canvas pixel; None if not found.

    `gap` is the tightest FootprintGap; sprites_* are the sprites of its classes (all instances);
    `footprint_at(sprite, cx, cy, scale, angle, mirror, (h, w))` renders a footprint (the
    renderer's, passed in so that plan/ stays below render in the layers).
    """
    pa, pb = np.array(gap.point_a), np.array(gap.point_b)
    d = pb - pa
    toward_b = math.degrees(math.atan2(-d[1], d[0])) if np.hypot(*d) > 1e-9 else 0.0
    hw = (canvas.height, canvas.width)
    sa, sb = box_max_scale(space, A.hi[gap.box_a]), box_max_scale(space, B.hi[gap.box_b])
    best = None
    for spa in sprites_a:
        for ma in _mirrors(space, A, gap.box_a):
            for ang_a in _allowed_angles(space, A, gap.box_a, toward_b - _farthest_direction(spa, ma)):
                fa = footprint_at(spa, pa[0], pa[1], sa, ang_a, ma, hw)
                if fa.footprint_px == 0:
                    continue
                for spb in sprites_b:
                    for mb in _mirrors(space, B, gap.box_b):
                        for ang_b in _allowed_angles(space, B, gap.box_b, toward_b + 180.0 - _farthest_direction(spb, mb)):
                            fb = footprint_at(spb, pb[0], pb[1], sb, ang_b, mb, hw)
                            shared = _shared(fa, fb)
                            if shared and (best is None or shared > best["shared_px"]):
                                best = {"shared_px": shared,
                                        "a": {"class": spa.class_name, "instance": spa.instance, "cx_px": float(pa[0]),
                                              "cy_px": float(pa[1]), "scale": sa, "angle": float(ang_a), "mirror": ma},
                                        "b": {"class": spb.class_name, "instance": spb.instance, "cx_px": float(pb[0]),
                                              "cy_px": float(pb[1]), "scale": sb, "angle": float(ang_b), "mirror": mb}}
                                return best
    return best


def _shared(fa, fb) -> int:
    ax0, ay0, ax1, ay1 = fa.bbox
    bx0, by0, bx1, by1 = fb.bbox
    x0, y0, x1, y1 = max(ax0, bx0), max(ay0, by0), min(ax1, bx1), min(ay1, by1)
    if x1 <= x0 or y1 <= y0:
        return 0
    ma = fa.mask[y0 - ay0 : y1 - ay0, x0 - ax0 : x1 - ax0]
    mb = fb.mask[y0 - by0 : y1 - by0, x0 - bx0 : x1 - bx0]
    return int(np.count_nonzero(ma & mb))
