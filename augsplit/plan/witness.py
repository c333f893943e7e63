"""Counterexamples for a refused footprint guarantee: two placements that share a pixel.

Two searches, both checked the same way (each placement must lie in its split's region and
the renderer's own footprints must share a pixel): `find_witness` tries the closest points
of the tightest pair of boxes with each object turned so its farthest pixel points at the
other, at the largest scale (cheap, finds clear overlaps); `pair_witness` checks the pairs
the envelope stage finds (envelope.py), which settle the cases near the bound.
"""

from __future__ import annotations

import math

import numpy as np

from ..space.axes import LEVELS, Space
from ..space.region import Region
from ..units import Canvas
from .geometry import box_max_scale, position_sets


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

    `gap` is the tightest FootprintGap; sprites_* are the sprites its classes may use in each split;
    `footprint_at(sprite, cx, cy, scale, angle, mirror, (h, w))` renders a footprint (the
    renderer's, passed in so that plan/ stays below render in the layers).
    """
    sets_a, sets_b = position_sets(A, canvas), position_sets(B, canvas)
    # the closest points of the bounding polygons may lie just outside a polar sector
    pa = sets_a[gap.box_a].clamp(np.array(gap.point_a))
    pb = sets_b[gap.box_b].clamp(np.array(gap.point_b))
    d = pb - pa
    toward_b = math.degrees(math.atan2(-d[1], d[0])) if np.hypot(*d) > 1e-9 else 0.0
    hw = (canvas.height, canvas.width)
    sa, sb = box_max_scale(space, A.hi[gap.box_a]), box_max_scale(space, B.hi[gap.box_b])
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
                            if not shared:
                                continue
                            if not (in_region(space, canvas, A, gap.box_a, spa.class_index, pa, sa, ang_a, ma)
                                    and in_region(space, canvas, B, gap.box_b, spb.class_index, pb, sb, ang_b, mb)):
                                continue
                            return {"shared_px": shared,
                                    "a": placement_dict(spa, pa[0], pa[1], sa, ang_a, ma),
                                    "b": placement_dict(spb, pb[0], pb[1], sb, ang_b, mb)}
    return None


def _shared(fa, fb) -> int:
    ax0, ay0, ax1, ay1 = fa.bbox
    bx0, by0, bx1, by1 = fb.bbox
    x0, y0, x1, y1 = max(ax0, bx0), max(ay0, by0), min(ax1, bx1), min(ay1, by1)
    if x1 <= x0 or y1 <= y0:
        return 0
    ma = fa.mask[y0 - ay0 : y1 - ay0, x0 - ax0 : x1 - ax0]
    mb = fb.mask[y0 - by0 : y1 - by0, x0 - bx0 : x1 - bx0]
    return int(np.count_nonzero(ma & mb))


def placement_dict(sprite, cx, cy, scale, angle, mirror) -> dict:
    """A placement as the witness reports it (renderer parameters, canvas px, degrees)."""
    return {"class": sprite.class_name, "instance": sprite.instance, "cx_px": float(cx), "cy_px": float(cy),
            "scale": float(scale), "angle": float(angle), "mirror": bool(mirror)}


def placement_t(space: Space, canvas: Canvas, region: Region, k: int, cls: int, xy, scale: float, angle: float,
                mirror: bool) -> np.ndarray:
    """The point of transform space (t coordinates) of a placement drawn from box k of
    `region`; axes that do not move pixels (hue, ...) take the box's midpoint."""
    t = (region.lo[k] + region.hi[k]) / 2.0
    cx, cy = float(xy[0]), float(xy[1])
    ccx, ccy = canvas.centre
    values = {"scale": scale, "angle": angle, "mirror": 1.0 if mirror else 0.0}
    if "eccentricity" in space:
        values["eccentricity"] = float(canvas.radius_from_px(space["eccentricity"].unit, math.hypot(cx - ccx, cy - ccy)))
        values["polar_angle"] = math.degrees(math.atan2(-(cy - ccy), cx - ccx))
    for name, v in (("x", cx), ("y", cy)):
        if name in space:
            values[name] = float(canvas.from_px(name, space[name].unit, v))
    for name, v in values.items():
        if name in space:
            t[space.index[name]] = float(space[name].to_t(v))
    t[space.index["class"]] = float(cls)
    return t


def in_region(space: Space, canvas: Canvas, region: Region, k: int, cls: int, xy, scale, angle, mirror) -> bool:
    """Whether the placement is one the split can really draw (box k is where it came from;
    any box of the region will do)."""
    t = placement_t(space, canvas, region, k, cls, xy, scale, angle, mirror)
    return bool(np.all(np.isfinite(t)) and region.contains_t(t[None])[0])


def pair_witness(space: Space, canvas: Canvas, A: Region, B: Region, items_a, items_b, footprint_at):
    """A checker for the envelope stage's pairs: given a pixel and one placement per split
    (each indexing its item list), render both footprints and return the witness if they
    share a pixel and both placements lie in their regions, else None."""
    hw = (canvas.height, canvas.width)

    def check(pixel, pa, pb):
        ia, ib = items_a[pa.item], items_b[pb.item]
        if not (in_region(space, canvas, A, ia.box, ia.cls, (pa.cx, pa.cy), pa.scale, pa.angle, pa.mirror)
                and in_region(space, canvas, B, ib.box, ib.cls, (pb.cx, pb.cy), pb.scale, pb.angle, pb.mirror)):
            return None
        fa = footprint_at(pa.sprite, pa.cx, pa.cy, pa.scale, pa.angle, pa.mirror, hw)
        fb = footprint_at(pb.sprite, pb.cx, pb.cy, pb.scale, pb.angle, pb.mirror, hw)
        shared = _shared(fa, fb)
        if not shared:
            return None
        return {"shared_px": shared, "pixel": [int(pixel[0]), int(pixel[1])],
                "a": placement_dict(pa.sprite, pa.cx, pa.cy, pa.scale, pa.angle, pa.mirror),
                "b": placement_dict(pb.sprite, pb.cx, pb.cy, pb.scale, pb.angle, pb.mirror)}

    return check
