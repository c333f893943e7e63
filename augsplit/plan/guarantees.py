"""Prove (or refuse) the split guarantees before any image is made.

`disjoint: parameters` — the smallest normalised Euclidean distance between the two regions'
boxes (circular axes the short way round, the class axis only pairs boxes) is at least the
margin. `disjoint: footprint` — for every pair of boxes, the gap between their position sets
exceeds the sum of the largest object radii (at each box's largest scale): then no pixel one
split can cover is coverable by the other. A refusal carries the numbers, and for footprints
a witness: two concrete placements whose rendered footprints share a pixel, when one exists.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..space.axes import CIRCULAR, CLASS, LEVELS, Space
from ..space.region import Region
from ..units import Canvas
from .geometry import WARP_SLACK_PX, box_classes, box_max_scale, position_sets, set_distance



@dataclass(frozen=True)
class Verdict:
    """Outcome of one guarantee: proved, refused (with numbers), guarded (auto_guard), or declared
    (a footprint claim of a spec without objects: nothing to prove it with; the audit checks it)."""

    kind: str  # "parameters" | "footprint"
    between: tuple[str, str]
    status: str  # "proved" | "refused" | "guarded" | "declared"
    per_class: bool
    numbers: dict = field(default_factory=dict)
    message: str = ""

    @property
    def ok(self) -> bool:
        return self.status in ("proved", "guarded", "declared")


# ---- parameters ----------------------------------------------------------------------------


def _pairs(space: Space, A: Region, B: Region, per_class: bool):
    """Box index pairs to compare: all pairs, or (per class) pairs that share a class."""
    ia, ib = np.meshgrid(np.arange(A.nbox), np.arange(B.nbox), indexing="ij")
    ia, ib = ia.ravel(), ib.ravel()
    if per_class and len(ia):
        c = space.index[CLASS]
        share = np.minimum(A.hi[ia, c], B.hi[ib, c]) - np.maximum(A.lo[ia, c], B.lo[ib, c]) > 1e-9
        ia, ib = ia[share], ib[share]
    return ia, ib


def parameter_gaps(space: Space, A: Region, B: Region, per_class: bool):
    """Normalised distance between each compared pair of boxes, and the pairs."""
    ia, ib = _pairs(space, A, B, per_class)
    axes = [i for i, n in enumerate(space.names) if n != CLASS]
    span = space.t_span[axes]
    alo, ahi = A.lo[ia][:, axes], A.hi[ia][:, axes]
    blo, bhi = B.lo[ib][:, axes], B.hi[ib][:, axes]
    gap = np.maximum(0.0, np.maximum(alo - bhi, blo - ahi))
    periodic = space.periodic[axes]
    if periodic.any():
        for shift in (-1.0, 1.0):
            s = shift * span
            g2 = np.maximum(0.0, np.maximum(alo - (bhi + s), (blo + s) - ahi))
            gap = np.where(periodic, np.minimum(gap, g2), gap)
    # a levels axis whose intervals merely touch (cells [i-.5, i+.5]) shares no level: count
    # the distance between the nearest levels instead of the zero gap between cells
    levels = np.array([space.axes[i].measure == LEVELS for i in axes])
    if levels.any():
        lgap = np.maximum(0.0, np.maximum(np.ceil(alo - 1e-9) - np.floor(bhi + 1e-9), np.ceil(blo - 1e-9) - np.floor(ahi + 1e-9)))
        gap = np.where(levels, lgap, gap)
    norm = gap / span
    return np.sqrt((norm ** 2).sum(axis=1)), ia, ib


def check_parameters(space: Space, A: Region, B: Region, margin: float, per_class: bool,
                     between: tuple[str, str]) -> Verdict:
    if A.is_empty() or B.is_empty():
        return Verdict("parameters", between, "proved", per_class, {"min_distance": math.inf, "margin": margin},
                       "one of the regions is empty")
    dist, ia, ib = parameter_gaps(space, A, B, per_class)
    if len(dist) == 0:
        return Verdict("parameters", between, "proved", per_class, {"min_distance": math.inf, "margin": margin},
                       "no class appears in both splits")
    k = int(dist.argmin())
    d = float(dist[k])
    overlap = A & B  # the class axis is part of the space, so this is also the shared-class overlap
    ok = (d >= margin and overlap.mass() <= 1e-12) if margin > 0 else overlap.mass() <= 1e-12
    nums = {"min_distance": d, "margin": margin, "overlap_mass": overlap.mass()}
    if ok:
        return Verdict("parameters", between, "proved", per_class, nums,
                       f"nearest boxes {d:.4g} apart in normalised units (margin {margin:g})")
    if overlap.mass() > 1e-12:
        msg = (f"the regions of {between[0]} and {between[1]} overlap (mass {overlap.mass():.4g} of the space), "
               f"e.g. {describe_box(space, overlap, 0)}")
    else:
        msg = (f"the regions of {between[0]} and {between[1]} come {d:.4g} apart in normalised units, "
               f"closer than the margin {margin:g}: {describe_box(space, A, int(ia[k]))} vs {describe_box(space, B, int(ib[k]))}")
    return Verdict("parameters", between, "refused", per_class, nums, msg)


def dilate_parameters(space: Space, A: Region, margin: float, per_class: bool) -> Region:
    """A superset of every point within `margin` (normalised Euclidean) of A: boxes grown by
    margin on each axis (Chebyshev), wrapping on circular axes; the class axis grows only
    when the guarantee is across classes."""
    grow = margin * space.t_span
    out = Region.empty(space)
    for k in range(A.nbox):
        lo, hi = A.lo[k] - grow, A.hi[k] + grow
        if not per_class:
            c = space.index[CLASS]
            lo[c], hi[c] = space.t_lo[c], space.t_hi[c]
        else:
            c = space.index[CLASS]
            lo[c], hi[c] = A.lo[k, c], A.hi[k, c]
        out = out | _clip_wrap(space, lo, hi)
    return out


def _clip_wrap(space: Space, lo: np.ndarray, hi: np.ndarray) -> Region:
    """A box that may stick out of the axes' ranges: clipped, or wrapped on circular axes."""
    pieces = [(lo.copy(), hi.copy())]
    for i, ax in enumerate(space.axes):
        nxt = []
        for l, h in pieces:
            if ax.measure == CIRCULAR and h[i] - l[i] >= ax.period:
                l = l.copy(); h = h.copy(); l[i], h[i] = space.t_lo[i], space.t_hi[i]
                nxt.append((l, h))
                continue
            for shift in (-ax.period, 0.0, ax.period) if ax.measure == CIRCULAR else (0.0,):
                l2, h2 = l.copy(), h.copy()
                l2[i] = max(l[i] + shift, space.t_lo[i]); h2[i] = min(h[i] + shift, space.t_hi[i])
                if h2[i] > l2[i]:
                    nxt.append((l2, h2))
        pieces = nxt
    out = Region.empty(space)
    for l, h in pieces:
        out = out | Region(space, l[None], h[None])
    return out


# ---- footprints ----------------------------------------------------------------------------


@dataclass(frozen=True)
class FootprintGap:
    """The tightest pair of boxes: their position gap and the gap their objects need."""

    gap_px: float
    need_px: float
    box_a: int
    box_b: int
    class_a: int
    class_b: int
    point_a: tuple[float, float]
    point_b: tuple[float, float]

    @property
    def slack_px(self) -> float:
        return self.gap_px - self.need_px


def footprint_gaps(space: Space, canvas: Canvas, A: Region, B: Region, radii_a: np.ndarray, radii_b: np.ndarray,
                   per_class: bool) -> list[FootprintGap]:
    """Gap and need for every compared pair of boxes (radii: native support radius per class)."""
    pa, pb = position_sets(A, canvas), position_sets(B, canvas)
    ia, ib = _pairs(space, A, B, per_class)
    out = []
    for i, j in zip(ia.tolist(), ib.tolist()):
        ca, cb = box_classes(space, A.lo[i], A.hi[i]), box_classes(space, B.lo[j], B.hi[j])
        if per_class:
            ca = cb = np.intersect1d(ca, cb)
        ka, kb = ca[np.argmax(radii_a[ca])], cb[np.argmax(radii_b[cb])]
        need = box_max_scale(space, A.hi[i]) * radii_a[ka] + box_max_scale(space, B.hi[j]) * radii_b[kb] + WARP_SLACK_PX
        gap, qa, qb = set_distance(pa[i], pb[j])
        out.append(FootprintGap(gap, float(need), i, j, int(ka), int(kb), tuple(map(float, qa)), tuple(map(float, qb))))
    return out


def tightest(gaps: list[FootprintGap]) -> FootprintGap | None:
    return min(gaps, key=lambda g: g.slack_px) if gaps else None


def largest_shared_radius(space: Space, canvas: Canvas, A: Region, B: Region,
                          per_class: bool) -> tuple[float, FootprintGap | None]:
    """The disc bound solved for the radius: objects of support radius below r, whatever their
    class, keep every compared pair of boxes at gap > scale_a r + scale_b r + warp slack (the
    bound footprint_gaps states). Returns r and the pair that sets it (its numbers for unit
    radii), or (inf, None) when no pair is compared."""
    ones = np.ones(len(space[CLASS].levels))
    best, which = math.inf, None
    for g in footprint_gaps(space, canvas, A, B, ones, ones, per_class):
        scales = g.need_px - WARP_SLACK_PX  # scale_a + scale_b: the need of unit radii, less the slack
        r = (g.gap_px - WARP_SLACK_PX) / scales if scales > 0 else math.inf
        if r < best:
            best, which = r, g
    return best, which


def dilate_positions(space: Space, canvas: Canvas, A: Region, grow_px: np.ndarray, per_class: bool) -> Region:
    """A superset of every parameter point whose position lies within grow_px[k] of box k of A.

    Other axes span their whole range (a footprint does not care about them); the class axis
    keeps A's classes when the guarantee is per class.
    """
    out = Region.empty(space)
    sets = position_sets(A, canvas)
    for k, ps in enumerate(sets):
        g = float(grow_px[k])
        lo, hi = space.t_lo.copy(), space.t_hi.copy()
        if per_class:
            c = space.index[CLASS]
            lo[c], hi[c] = A.lo[k, c], A.hi[k, c]
        if ps.kind == "rect":
            x0, x1, y0, y1 = ps.bounds
            for name, a, b in (("x", x0 - g, x1 + g), ("y", y0 - g, y1 + g)):
                if name in space:
                    ax = space[name]
                    i = space.index[name]
                    va = max(float(canvas.from_px(name, ax.unit, a)), ax.lo)
                    vb = min(float(canvas.from_px(name, ax.unit, b)), ax.hi)
                    if ax.measure == LEVELS:
                        lo[i], hi[i] = _level_cover(ax, va, vb)
                    else:
                        lo[i], hi[i] = float(ax.to_t(va)), float(ax.to_t(vb))
            out = out | _clip_wrap(space, lo, hi)
        else:
            ea = space["eccentricity"]; i = space.index["eccentricity"]
            j = space.index["polar_angle"]
            for ra, rb, delta in sector_rings(*ps.bounds, g):
                ring_lo, ring_hi = lo.copy(), hi.copy()
                va, vb = float(canvas.radius_from_px(ea.unit, ra)), float(canvas.radius_from_px(ea.unit, rb))
                ring_lo[i], ring_hi[i] = max(space.t_lo[i], float(ea.to_t(va))), min(space.t_hi[i], float(ea.to_t(vb)))
                if delta is None:
                    ring_lo[j], ring_hi[j] = space.t_lo[j], space.t_hi[j]
                else:
                    ring_lo[j], ring_hi[j] = ps.bounds[2] - delta, ps.bounds[3] + delta
                out = out | _clip_wrap(space, ring_lo, ring_hi)
    return out


RING_RATIO = 1.25  # outer / inner radius of the rings a grown sector is cut into


def sector_rings(r0: float, r1: float, p0: float, p1: float, g: float) -> list[tuple[float, float, float | None]]:
    """The points within g px of the sector r in [r0, r1], polar angle in [p0, p1] (degrees),
    as rings (inner px, outer px, angular growth in degrees, None for all round).

    A point at radius rho > g whose direction differs from every direction of the sector by
    d (<= 90 deg) lies at least rho sin(d) from it (its distance to the nearest ray), so
    within g of the sector d <= asin(g / rho); each ring takes the growth at its inner
    radius. Within g of the centre every direction is near, so a sector reaching the centre
    only loses its direction there, not everywhere."""
    if g <= 0:
        return [(r0, r1, 0.0)]
    inner, outer = max(r0 - g, 0.0), r1 + g
    rings: list[tuple[float, float, float | None]] = []
    if inner < g:
        rings.append((inner, min(g, outer), None))
        inner = g
    while inner < outer:
        nxt = min(outer, inner * RING_RATIO)
        delta = math.degrees(math.asin(min(1.0, g / inner)))
        rings.append((inner, nxt, None if 2 * delta + (p1 - p0) >= 360.0 else delta))
        inner = nxt
    return rings


def _level_cover(ax, va: float, vb: float) -> tuple[float, float]:
    idx = [i for i, v in enumerate(ax.levels) if va - 1e-9 <= v <= vb + 1e-9]
    if not idx:
        return 0.0, 0.0
    return idx[0] - 0.5, idx[-1] + 0.5


def describe_box(space: Space, region: Region, k: int) -> str:
    from .regions import t_interval_text

    parts = []
    for i, ax in enumerate(space.axes):
        if ax.name == CLASS:
            continue
        if region.lo[k, i] > space.t_lo[i] + 1e-9 or region.hi[k, i] < space.t_hi[i] - 1e-9:
            parts.append(f"{ax.name} {t_interval_text(ax, region.lo[k, i], region.hi[k, i])}")
    return ", ".join(parts) or "the whole space"
