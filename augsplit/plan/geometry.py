"""Footprint geometry: object extents, position sets in pixels, and distances between them.

Conservative by construction, so a "disjoint" verdict is a proof: the object's footprint is
bounded by a disc about its anchor (see `bilinear_reach` for how far past a pixel with
alpha > 0 bilinear sampling can still exceed the threshold), and position sets are polygons
that contain the true sets (a polar sector's outer arc is circumscribed, its inner arc
replaced by chords).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..space.axes import LEVELS, Space
from ..space.region import Region
from ..units import Canvas

ARC_SEGMENTS_PER_TURN = 256
# OpenCV's warpAffine resolves source coordinates to 1/32 px (INTER_BITS = 5, from memory),
# so the support may reach that much further; a quarter pixel covers it with room to spare.
WARP_SLACK_PX = 0.25


def bilinear_reach(alpha_threshold: float) -> float:
    """How far from the nearest pixel centre with alpha > 0 a point can lie and still get an
    interpolated alpha above the threshold.

    Bilinear weights of a point's four neighbour centres sum to 1, so if the point's alpha
    exceeds t, some neighbour with alpha > 0 carries weight >= t/4, i.e. (1-|dx|)(1-|dy|) >= t/4.
    The largest sqrt(dx^2 + dy^2) on that set is at dx = dy = 1 - sqrt(t/4) or on an axis at
    1 - t/4; we take the larger. (t = 0 gives the whole 2 x 2 square: sqrt 2.)
    """
    w = max(alpha_threshold, 0.0) / 4.0
    return max(math.sqrt(2.0) * (1.0 - math.sqrt(w)), 1.0 - w)


def reach(mask: np.ndarray, anchor: tuple[float, float], grow: float = 0.0) -> float:
    """THE reach of a sprite: the largest distance from `anchor` (x, y) to a point of the pixel
    squares where `mask` is true, each square [c, c + 1) x [r, r + 1) grown by `grow` px on
    every side (grow -0.5 shrinks a square to its centre); 0 for an empty mask. Source pixels:
    multiply by the scale for canvas pixels. Every "how far does the object reach" is this:

    * native extent (Sprite.radius, size_px / 2): mask alpha > threshold, grow 0;
    * proof bound of the warped footprint (support_radius): alpha > 0, grow -0.5, plus
      `bilinear_reach(threshold)`;
    * zero-alpha bound of bilinear sampling (envelope): alpha > 0, grow 0.5;
    * placed content (albu): the content's rectangle, grow 0.5.
    """
    rows, cols = np.nonzero(mask)
    return reach_of_cells(rows, cols, anchor, grow)


def reach_of_cells(rows, cols, anchor: tuple[float, float], grow: float = 0.0) -> float:
    """`reach` over the pixels (rows[i], cols[i]): the farthest corner of their grown squares."""
    rows, cols = np.asarray(rows, dtype=float), np.asarray(cols, dtype=float)
    if rows.size == 0:
        return 0.0
    ax, ay = anchor
    dx = np.maximum(np.abs(cols - grow - ax), np.abs(cols + 1 + grow - ax))
    dy = np.maximum(np.abs(rows - grow - ay), np.abs(rows + 1 + grow - ay))
    return float(np.hypot(dx, dy).max())


def support_radius(rgba: np.ndarray, anchor: tuple[float, float], alpha_threshold: float = 0.0) -> float:
    """Largest distance from the anchor at which the warped sprite can have alpha above the
    threshold, in source pixels (multiply by the scale for canvas pixels)."""
    if not rgba[..., 3].any():
        return 0.0
    return reach(rgba[..., 3] > 0, anchor, grow=-0.5) + bilinear_reach(alpha_threshold)


@dataclass(frozen=True)
class PositionSet:
    """Where one box of a region can put an object's anchor, in canvas px."""

    kind: str  # "rect" or "sector"
    # rect: (x0, x1, y0, y1); sector: (r0, r1, phi0_deg, phi1_deg) about the canvas centre
    bounds: tuple[float, float, float, float]
    centre: tuple[float, float]

    def polygon(self) -> np.ndarray:
        """Vertices (k, 2) of a polygon containing the set (counter-clockwise on screen)."""
        if self.kind == "rect":
            x0, x1, y0, y1 = self.bounds
            return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], dtype=float)
        r0, r1, p0, p1 = self.bounds
        span = p1 - p0
        n = max(2, int(math.ceil(ARC_SEGMENTS_PER_TURN * span / 360.0)))
        step = math.radians(span) / n
        outer_r = r1 / math.cos(step / 2.0)
        # the outer arc's circumscribed polygon: vertices at the arc ends (radius r1) and at the
        # tangent intersections between them (radius r1 / cos(step/2))
        mids = np.radians(p0) + step * (np.arange(n) + 0.5)
        outer = [(r1, math.radians(p0))] + [(outer_r, m) for m in mids] + [(r1, math.radians(p1))]
        inner_angles = np.radians(p0) + step * np.arange(n + 1)
        inner = [(r0, a) for a in inner_angles[::-1]] if r0 > 0 else [(0.0, 0.0)]
        cx, cy = self.centre
        pts = [(cx + r * math.cos(a), cy - r * math.sin(a)) for r, a in outer + inner]
        return np.array(pts, dtype=float)

    def clamp(self, xy: np.ndarray) -> np.ndarray:
        """The point of the true set nearest to xy (used to turn polygon points into params)."""
        x, y = float(xy[0]), float(xy[1])
        if self.kind == "rect":
            x0, x1, y0, y1 = self.bounds
            return np.array([min(max(x, x0), x1), min(max(y, y0), y1)])
        r0, r1, p0, p1 = self.bounds
        cx, cy = self.centre
        r = math.hypot(x - cx, y - cy)
        phi = math.degrees(math.atan2(-(y - cy), x - cx))
        phi = p0 + ((phi - p0) % 360.0)
        if phi > p1:  # outside the angular span: nearer end
            phi = p1 if (phi - p1) < (p0 + 360.0 - phi) else p0
        r = min(max(r, r0), r1)
        a = math.radians(phi)
        return np.array([cx + r * math.cos(a), cy - r * math.sin(a)])


def position_sets(region: Region, canvas: Canvas) -> list[PositionSet]:
    """One position set per box of `region` (the boxes' other axes are ignored here)."""
    space = region.space
    out = []
    for k in range(region.nbox):
        out.append(_box_position(space, region.lo[k], region.hi[k], canvas))
    return out


def _value_interval(space: Space, name: str, lo_t: float, hi_t: float) -> tuple[float, float]:
    ax = space[name]
    if ax.measure == LEVELS:
        idx = [i for i in range(len(ax.levels)) if lo_t - 1e-9 <= i <= hi_t + 1e-9]
        vals = [ax.levels[i] for i in idx]
        return min(vals), max(vals)
    return float(ax.from_t(lo_t)), float(ax.from_t(hi_t))


def _box_position(space: Space, lo: np.ndarray, hi: np.ndarray, canvas: Canvas) -> PositionSet:
    centre = canvas.centre
    if "eccentricity" in space:
        i = space.index["eccentricity"]
        e0, e1 = _value_interval(space, "eccentricity", lo[i], hi[i])
        unit = space["eccentricity"].unit
        r0, r1 = float(canvas.radius_to_px(unit, e0)), float(canvas.radius_to_px(unit, e1))
        j = space.index["polar_angle"]
        p0, p1 = _value_interval(space, "polar_angle", lo[j], hi[j])
        return PositionSet("sector", (r0, r1, p0, p1), centre)
    bounds = []
    for name, mid in (("x", centre[0]), ("y", centre[1])):
        if name in space:
            i = space.index[name]
            a, b = _value_interval(space, name, lo[i], hi[i])
            unit = space[name].unit
            bounds += [float(canvas.to_px(name, unit, a)), float(canvas.to_px(name, unit, b))]
        else:
            bounds += [mid, mid]
    return PositionSet("rect", tuple(bounds), centre)


def box_classes(space: Space, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    i = space.index["class"]
    n = len(space["class"].levels)
    return np.array([c for c in range(n) if lo[i] - 1e-9 <= c <= hi[i] + 1e-9], dtype=int)


def box_max_scale(space: Space, hi: np.ndarray) -> float:
    if "scale" not in space:
        return 1.0
    ax = space["scale"]
    i = space.index["scale"]
    if ax.measure == LEVELS:
        return max(v for k, v in enumerate(ax.levels) if k <= hi[i] + 1e-9)
    return float(ax.from_t(hi[i]))


# ---- polygon distance ------------------------------------------------------------------


def _inside(points: np.ndarray, poly: np.ndarray) -> np.ndarray:
    """Even-odd point-in-polygon for many points."""
    x, y = points[:, 0:1], points[:, 1:2]
    x0, y0 = poly[:, 0], poly[:, 1]
    x1, y1 = np.roll(x0, -1), np.roll(y0, -1)
    cond = (y0 > y) != (y1 > y)
    with np.errstate(divide="ignore", invalid="ignore"):
        xint = x0 + (y - y0) * (x1 - x0) / (y1 - y0)
    return np.count_nonzero(cond & (x < xint), axis=1) % 2 == 1


def _point_segment(p: np.ndarray, a: np.ndarray, b: np.ndarray):
    """Distances (n, m) from points p (n,2) to segments a->b (m,2), and the nearest points."""
    ab = b - a
    ap = p[:, None, :] - a[None, :, :]
    denom = np.maximum((ab * ab).sum(-1), 1e-300)
    t = np.clip((ap * ab[None]).sum(-1) / denom, 0.0, 1.0)
    near = a[None] + t[..., None] * ab[None]
    d = np.linalg.norm(p[:, None, :] - near, axis=-1)
    return d, near


def polygon_distance(P: np.ndarray, Q: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Smallest distance between two simple polygons (0 when they meet) and a closest pair."""
    if _inside(P[:1], Q)[0]:
        return 0.0, P[0], P[0]
    if _inside(Q[:1], P)[0]:
        return 0.0, Q[0], Q[0]
    Pa, Pb = P, np.roll(P, -1, axis=0)
    Qa, Qb = Q, np.roll(Q, -1, axis=0)
    if _segments_cross(Pa, Pb, Qa, Qb):
        return 0.0, P[0], P[0]
    d1, n1 = _point_segment(P, Qa, Qb)  # vertices of P to edges of Q
    d2, n2 = _point_segment(Q, Pa, Pb)
    i1 = np.unravel_index(d1.argmin(), d1.shape)
    i2 = np.unravel_index(d2.argmin(), d2.shape)
    if d1[i1] <= d2[i2]:
        return float(d1[i1]), P[i1[0]], n1[i1]
    return float(d2[i2]), n2[i2], Q[i2[0]]


def _segments_cross(a0, a1, b0, b1) -> bool:
    def orient(p, q, r):
        return (q[..., 0] - p[..., 0]) * (r[..., 1] - p[..., 1]) - (q[..., 1] - p[..., 1]) * (r[..., 0] - p[..., 0])

    A0, A1 = a0[:, None, :], a1[:, None, :]
    B0, B1 = b0[None, :, :], b1[None, :, :]
    o1, o2 = orient(A0, A1, B0), orient(A0, A1, B1)
    o3, o4 = orient(B0, B1, A0), orient(B0, B1, A1)
    return bool(np.any((o1 * o2 <= 0) & (o3 * o4 <= 0)
                       & (np.maximum(A0[..., 0], A1[..., 0]) >= np.minimum(B0[..., 0], B1[..., 0]))
                       & (np.maximum(B0[..., 0], B1[..., 0]) >= np.minimum(A0[..., 0], A1[..., 0]))
                       & (np.maximum(A0[..., 1], A1[..., 1]) >= np.minimum(B0[..., 1], B1[..., 1]))
                       & (np.maximum(B0[..., 1], B1[..., 1]) >= np.minimum(A0[..., 1], A1[..., 1]))))


def set_distance(a: PositionSet, b: PositionSet) -> tuple[float, np.ndarray, np.ndarray]:
    """Distance between two position sets (exact for rectangles, a lower bound for sectors)."""
    if a.kind == "rect" and b.kind == "rect":
        ax0, ax1, ay0, ay1 = a.bounds
        bx0, bx1, by0, by1 = b.bounds
        gx = max(0.0, bx0 - ax1, ax0 - bx1)
        gy = max(0.0, by0 - ay1, ay0 - by1)
        # closest points: clamp each rectangle's centre-facing coordinate
        pa = np.array([min(max(bx0, ax0), ax1) if bx0 > ax1 else (max(min(bx1, ax1), ax0) if bx1 < ax0 else max(ax0, bx0)),
                       min(max(by0, ay0), ay1) if by0 > ay1 else (max(min(by1, ay1), ay0) if by1 < ay0 else max(ay0, by0))])
        pb = b.clamp(pa)
        return math.hypot(gx, gy), pa, pb
    return polygon_distance(a.polygon(), b.polygon())
