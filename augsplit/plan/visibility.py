"""How much of an object the canvas shows: the least visible fraction a region allows.

From geometry alone, before anything is rendered. An object's footprint is, up to the
bilinear fringe, its opaque source pixels mapped by the placement (mirror, rotation, scale
about the anchor, as the renderer does). Each opaque pixel is cut into n x n sub-cells with
n >= sqrt(2) x the largest scale, so a mapped sub-cell is narrower than a canvas pixel: the
visible fraction of a placement is the share of sub-cell centres that land on the canvas.

Which placements: a box of a region allows anchors in a rectangle (or polar sector), angles,
scales and mirrors. How far the object reaches past an edge is largest at an extreme anchor
(a rectangle's corner; a sector's arc ends, its axis directions, both radii) and at an angle
where a convex-hull vertex of the sprite is farthest out that way (or an interval end), at
either end of the scale interval: those poses are all tried, so whether any part can leave
the canvas is decided exactly for the sub-cell centres. The least fraction is the least over
those poses and a 10-degree sweep of angles (a sampled minimum: the true one can only be
lower).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from ..space.axes import Space
from ..space.region import Region
from ..units import Canvas
from .geometry import PositionSet, box_classes, box_max_scale, position_sets, support_radius

ANGLE_STEP_DEG = 10.0
ARC_STEP_DEG = 5.0
MAX_POINTS = 20_000
COARSE_POINTS = 128  # points per pose when ranking poses
REFINE_POSES = 32  # the lowest-ranked poses, counted again with every point


@dataclass(frozen=True)
class Worst:
    """The placement that leaves the least of an object on the canvas."""

    fraction: float  # share of the object's footprint on the canvas (0 = wholly off)
    cls: int
    instance: int
    box: int  # index of the box of the class's region
    cx: float  # anchor, canvas px
    cy: float
    scale: float
    angle: float  # degrees, counter-clockwise on screen
    mirror: bool
    edges: tuple[str, ...]  # canvas edges it crosses: left, right, top, bottom
    smaller_scale_helps: bool  # at the box's smallest scale the same anchor and angle show more


def sprite_points(sprite, alpha_threshold: float, max_scale: float) -> np.ndarray:
    """Sub-cell centres of the sprite's opaque pixels, relative to the anchor (source px, y down)."""
    rows, cols = np.nonzero(sprite.rgba[..., 3] > alpha_threshold * 255)
    if rows.size == 0:  # a sprite whose alpha never passes the threshold leaves no footprint
        return np.zeros((0, 2))
    n = max(1, int(math.ceil(max_scale * math.sqrt(2.0) + 1e-9)))
    while rows.size * n * n > MAX_POINTS and n > 1:
        n -= 1
    sub = (np.arange(n) + 0.5) / n
    sx, sy = np.meshgrid(sub, sub)
    x = (cols[:, None] + sx.ravel()[None]).ravel() - sprite.anchor[0]
    y = (rows[:, None] + sy.ravel()[None]).ravel() - sprite.anchor[1]
    pts = np.stack([x, y], axis=1)
    if len(pts) > MAX_POINTS:
        pts = pts[:: int(math.ceil(len(pts) / MAX_POINTS))]
    return pts


def _hull(pts: np.ndarray) -> np.ndarray:
    if len(pts) < 3:
        return pts
    return cv2.convexHull(pts.astype(np.float32)).reshape(-1, 2).astype(np.float64)


def _offsets(pts: np.ndarray, angle_deg: np.ndarray, scale: np.ndarray, mirror: np.ndarray):
    """Canvas offsets (poses, points) of sprite points: the renderer's mirror, then rotation
    counter-clockwise on screen and scale about the anchor (render.similarity_matrix)."""
    t = np.radians(angle_deg)[:, None]
    a, b = scale[:, None] * np.cos(t), scale[:, None] * np.sin(t)
    m = np.where(mirror, -1.0, 1.0)[:, None]
    dx, dy = pts[None, :, 0], pts[None, :, 1]
    return m * a * dx + b * dy, -m * b * dx + a * dy


def _extreme_angles(hull: np.ndarray, mirrors) -> np.ndarray:
    """Rotation angles (deg) at which a hull vertex is farthest right, left, down or up."""
    out = []
    for mir in mirrors:
        m = -1.0 if mir else 1.0
        dx, dy = m * hull[:, 0], hull[:, 1]
        # x offset = s (dx cos t + dy sin t) is extreme at t = atan2(dy, dx) (+ 180);
        # y offset = s (dy cos t - dx sin t) is extreme at t = atan2(-dx, dy) (+ 180)
        for base in (np.degrees(np.arctan2(dy, dx)), np.degrees(np.arctan2(-dx, dy))):
            out += [base, base + 180.0]
    return np.concatenate(out) if out else np.zeros(0)


def _angle_candidates(intervals, hull: np.ndarray, mirrors) -> np.ndarray:
    ext = _extreme_angles(hull, mirrors)
    cand = []
    for a0, a1 in intervals:
        if a1 - a0 <= 1e-12:
            cand.append(np.array([a0]))
            continue
        sweep = np.linspace(a0, a1, max(2, int(math.ceil((a1 - a0) / ANGLE_STEP_DEG)) + 1))
        inside = a0 + np.mod(ext - a0, 360.0)
        cand += [sweep, inside[inside <= a1 + 1e-9]]
    return np.unique(np.round(np.concatenate(cand), 9))


def _anchor_candidates(ps: PositionSet) -> np.ndarray:
    if ps.kind == "rect":
        x0, x1, y0, y1 = ps.bounds
        return np.array([[x0, y0], [x1, y0], [x0, y1], [x1, y1]], dtype=float)
    r0, r1, p0, p1 = ps.bounds
    sweep = np.linspace(p0, p1, max(2, int(math.ceil((p1 - p0) / ARC_STEP_DEG)) + 1))
    axes = p0 + np.mod(np.arange(0.0, 360.0, 45.0) - p0, 360.0)  # the axis and corner directions
    phi = np.unique(np.concatenate([sweep, axes[axes <= p1 + 1e-9]]))
    cx, cy = ps.centre
    r = np.array([r0, r1], dtype=float)[:, None]
    xs = cx + r * np.cos(np.radians(phi))[None]
    ys = cy - r * np.sin(np.radians(phi))[None]
    return np.stack([xs.ravel(), ys.ravel()], axis=1)


def _reaches_out(ps: PositionSet, radius: float, canvas: Canvas) -> bool:
    """Whether a disc of `radius` about some anchor of the set can leave the canvas."""
    if ps.kind == "rect":
        x0, x1, y0, y1 = ps.bounds
    else:
        poly = ps.polygon()
        x0, x1, y0, y1 = poly[:, 0].min(), poly[:, 0].max(), poly[:, 1].min(), poly[:, 1].max()
    return x0 - radius < 0 or y0 - radius < 0 or x1 + radius > canvas.width or y1 + radius > canvas.height


def least_visible(space: Space, canvas: Canvas, region: Region, sprites: dict[int, list],
                  alpha_threshold: float) -> Worst | None:
    """The least visible placement over every box of `region` and the sprites each of its
    classes may use (class index -> sprites), or None when every object stays whole."""
    worst = None
    sets = position_sets(region, canvas)
    for k in range(region.nbox):
        smax = box_max_scale(space, region.hi[k])
        for c in box_classes(space, region.lo[k], region.hi[k]).tolist():
            for sp in sprites.get(c, ()):
                r = support_radius(sp.rgba, sp.anchor, alpha_threshold) * smax
                if not _reaches_out(sets[k], r, canvas):
                    continue
                from .envelope import box_pose  # imported only when needed: it pulls in scipy.signal

                pose = box_pose(space, region.lo[k], region.hi[k])
                w = _least_visible_box(sets[k], pose, sp, canvas, alpha_threshold)
                if w is not None and (worst is None or w[0] < worst.fraction):
                    worst = Worst(w[0], c, sp.instance, k, *w[1:])
    return worst


def _least_visible_box(ps: PositionSet, pose, sprite, canvas: Canvas, alpha_threshold: float):
    pts = sprite_points(sprite, alpha_threshold, pose.max_scale)
    if len(pts) == 0:
        return None
    hull = _hull(pts)
    anchors = np.unique(_anchor_candidates(ps), axis=0)
    angles = _angle_candidates(pose.angles, hull, pose.mirrors)
    scales = np.unique([v for iv in pose.scales for v in iv])
    # a pose is an anchor and a turn (angle, scale, mirror); offsets depend on the turn only
    it, isc, im = (g.ravel() for g in np.meshgrid(np.arange(len(angles)), np.arange(len(scales)),
                                                  np.arange(len(pose.mirrors)), indexing="ij"))
    turn_angle, turn_scale, turn_mirror = angles[it], scales[isc], np.array(pose.mirrors)[im]
    W, H = canvas.width, canvas.height

    def share_inside(p, turns, anchor_idx):
        """(anchors, turns) share of the points p on the canvas."""
        ox, oy = _offsets(p, turn_angle[turns], turn_scale[turns], turn_mirror[turns])
        ax, ay = anchors[anchor_idx, 0][:, None, None], anchors[anchor_idx, 1][:, None, None]
        x, y = ax + ox[None], ay + oy[None]
        return ((x >= 0) & (x < W) & (y >= 0) & (y < H)).mean(axis=2)

    every_turn, every_anchor = np.arange(len(it)), np.arange(len(anchors))
    # the canvas is convex: a pose whose hull stays on it keeps the whole object on it
    if share_inside(hull, every_turn, every_anchor).min() >= 1.0:
        return None
    # rank the poses on a thinned set of points, then count every point for the lowest few
    coarse = pts[:: max(1, len(pts) // COARSE_POINTS)]
    rough = share_inside(coarse, every_turn, every_anchor).ravel()
    best = np.argsort(rough, kind="stable")[:REFINE_POSES]
    ia, iturn = np.divmod(best, len(it))
    exact = np.array([share_inside(pts, iturn[k:k + 1], ia[k:k + 1])[0, 0] for k in range(len(best))])
    k = int(np.argmin(exact))
    f, a, t = float(exact[k]), int(ia[k]), int(iturn[k])
    ox, oy = _offsets(pts, turn_angle[t:t + 1], turn_scale[t:t + 1], turn_mirror[t:t + 1])
    x, y = anchors[a, 0] + ox, anchors[a, 1] + oy
    edges = tuple(e for e, hit in (("left", (x < 0).any()), ("right", (x >= W).any()),
                                   ("top", (y < 0).any()), ("bottom", (y >= H).any())) if hit)
    helps = False
    if turn_scale[t] > scales.min():
        ox, oy = _offsets(pts, turn_angle[t:t + 1], scales[:1], turn_mirror[t:t + 1])
        xs, ys = anchors[a, 0] + ox, anchors[a, 1] + oy
        helps = float(((xs >= 0) & (xs < W) & (ys >= 0) & (ys < H)).mean()) > f + 1e-9
    return (f, float(anchors[a, 0]), float(anchors[a, 1]), float(turn_scale[t]), float(turn_angle[t]),
            bool(turn_mirror[t]), edges, helps)
