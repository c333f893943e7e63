"""Rasterised footprint envelopes: the second and third stage of the footprint proof.

Owns (2) a conservative mask of every canvas pixel the objects of a region can cover, built
on a super-sampled grid from a log-polar table of each sprite, and (3) a branch-and-bound
test of one pixel that either finds a placement covering it or proves none exists.

Why this is a proof (a pixel left out of a mask is covered by no allowed placement):

* A placement (anchor at c, angle th, scale s, mirror m) puts canvas pixel centre p in the
  footprint iff a(u) > t, where u = anchor + (1/s) M R(-th) (p - c) and a is the bilinear
  interpolation of the sprite's alpha (zero outside). We evaluate a exactly in float64;
  the renderer's float32 warp differs by less than ALPHA_SLACK (OpenCV 5's four-channel
  float warp does not quantise coordinates; test_envelope measures it), so every test
  below uses the threshold t - ALPHA_SLACK.
* a is piecewise bilinear with values in [0, 1], so on each source cell |da/dx| and |da/dy|
  are convex combinations of differences of values in [0, 1]: |a(u) - a(v)| <= |dx| + |dy|
  <= sqrt(2) |u - v| (the constant sqrt 2 is attained at a 0/1/1 corner).
* In polar coordinates about the anchor (log radius l, screen angle phi), a rotation by th
  is the shift phi + th, a scale s is the shift l + ln s and the mirror is phi -> pi - phi.
  So the union over a whole angle interval and scale interval is an exact box sweep in
  (l, phi): no angle or scale is sampled. The table marks every (l, phi) bin whose annular
  sector may meet {a > t'}: a(centre) + sqrt(2) * (bin radius) > t' (Lipschitz above),
  and a core disc rho < rho_min is marked when a(anchor) + sqrt(2) rho_min > t'.
* Offsets z = p - c are rasterised as cells of side h = 1/f (f odd) centred on the lattice
  n*h; a cell is kept when the (l, phi) box that contains it, swept by the box's scales
  and angles, holds a marked bin (summed-area table). Positions are rasterised as the
  cells [a h, (a+1) h] that touch the position set. Pixel centres sit at cell centres
  (f odd), so p - (position cell) is exactly an offset cell: p is in the envelope only
  if some position cell a and the offset cell m_p - a are both kept, which is a binary
  dilation sampled at pixel centres. Both sets are kept as runs along rows, and a run of
  each adds up to one run of cells, so each pixel row is a union of intervals (exact,
  and never built on the super-sampled grid). Every step keeps a superset; the only
  looseness is one cell (h px) plus the bins' Lipschitz margin.
* Stage 3 works on boxes of placements (anchor c, angle th, scale s) for one pixel p:
  over a box, u stays within D = |c - c0|/s_lo + |z0| ((1/s_lo - 1/s0) + dth/s0) of its
  value u0 at the box centre (z0 = p - c0; |R(a) - R(b)| <= |a - b|, and 1/s - 1/s0 is
  largest at s_lo), so a(u) is at most each of: a(u0) + sqrt(2) D; the largest alpha of
  the source cells the square u0 +- D touches (bilinear is a convex combination of a
  cell's corners; a sparse table answers it); for D < 1/2 the exact maximum on that
  square (bilinear is linear along each axis inside a cell, so it peaks where the square's
  edges and the grid lines cross); and 0 once |u0 - anchor| - D exceeds the alpha radius.
  Boxes whose bound stays <= t' are dropped (largest bound first); a box centre with
  a(u0) > t + WITNESS_MARGIN is a real placement covering p. A pixel whose best alpha is
  pinned within TIE_BAND of t cannot be settled by bounds (only the renderer's rounding
  decides it): it stays "undecided", and its best placement is rendered to find out.
* A run of pixels p0 + k d (k < n) folds into one problem: p0 + k d with anchor c is p0
  with anchor c - k d, so its positions are the set grown by the run. For a rectangle at
  least one pixel long along d this is exact both ways (an anchor of the grown set maps
  back to a pixel of the run and an anchor of the true set), so one search excludes a
  whole run along a straight boundary.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import cv2
import numpy as np

from ..space.axes import LEVELS, Space
from ..space.region import Region
from ..units import Canvas
from .geometry import PositionSet, box_classes, position_sets
from .geometry import reach as sprite_reach  # this module has a reach of its own (of a run of items)

TWO_PI = 2.0 * math.pi
SQRT2 = math.sqrt(2.0)
# Largest difference between the renderer's warped alpha and exact float64 bilinear
# interpolation. OpenCV 5 warps four-channel float images without snapping coordinates and
# the renderer warps into the object's own box, so coordinates stay patch-sized (measured
# below 2e-6; test_envelope re-measures it against this bound); older builds snap sample
# positions to 1/32 px (INTER_BITS = 5, from memory), which moves alpha by up to 2/32.
ALPHA_SLACK = 1e-4 if int(cv2.__version__.split(".")[0]) >= 5 else 1.0 / 16.0 + 1e-4
# A stage-3 witness must beat the threshold by this much, so the renderer agrees with it.
WITNESS_MARGIN = 2e-4
# Placement boxes searched for a clear witness once one within ALPHA_SLACK of the threshold
# shows that the pixel cannot be excluded; and the band about the threshold within which a
# pixel whose best alpha is pinned down (best found and bound both inside) stays undecided.
TIE_BOXES = 20_000
TIE_BAND = 5 * ALPHA_SLACK
SUPER = 5  # cells per pixel side on the super-sampled grid (odd: pixel centres are cell centres)
BIN_TOL_PX = 0.15  # log-polar bin size at the object's rim, in canvas px at the largest scale
MAX_BINS = 3_000_000
# All sprites' tables together (two int32 summed-area tables over a doubled angle axis, about
# 16 B per bin): a spec with thousands of classes shares this budget, its tables coarser
# (coarser bins only widen each bin's reach, so the proof stays sound, if less sharp). It binds
# only where the tables would take more than about 6 GB (e.g. over ~900 polyomino classes of
# 5 px cells), so the proofs of specs that ran before are unchanged; 4,655 classes went past
# 20 GB without it
MAX_TABLE_BINS = 400_000_000


# ---- what a box allows besides its position ----------------------------------------------


@dataclass(frozen=True)
class Pose:
    """Scales and angles (closed intervals; a level is a zero-width interval, angles in
    degrees counter-clockwise, a full turn is (0, 360)) and mirror levels of one box."""

    scales: tuple[tuple[float, float], ...]
    angles: tuple[tuple[float, float], ...]
    mirrors: tuple[bool, ...]

    @property
    def max_scale(self) -> float:
        return max(b for _, b in self.scales)


def _box_levels(space: Space, name: str, lo: np.ndarray, hi: np.ndarray) -> list[float]:
    ax, i = space[name], space.index[name]
    return [v for k, v in enumerate(ax.levels) if lo[i] - 1e-9 <= k <= hi[i] + 1e-9]


def box_pose(space: Space, lo: np.ndarray, hi: np.ndarray) -> Pose:
    if "scale" not in space:
        scales = ((1.0, 1.0),)
    elif space["scale"].measure == LEVELS:
        scales = tuple((v, v) for v in _box_levels(space, "scale", lo, hi))
    else:
        ax, i = space["scale"], space.index["scale"]
        scales = ((float(ax.from_t(lo[i])), float(ax.from_t(hi[i]))),)
    if "angle" not in space:
        angles = ((0.0, 0.0),)
    elif space["angle"].measure == LEVELS:
        angles = tuple((v, v) for v in _box_levels(space, "angle", lo, hi))
    else:
        ax, i = space["angle"], space.index["angle"]
        a, b = float(ax.from_t(lo[i])), float(ax.from_t(hi[i]))
        angles = ((0.0, 360.0),) if b - a >= 360.0 - 1e-9 else ((a, b),)
    if "mirror" not in space:
        mirrors = (False,)
    else:
        mirrors = tuple(sorted({bool(v) for v in _box_levels(space, "mirror", lo, hi)}))
    return Pose(scales, angles, mirrors)


@dataclass(frozen=True, eq=False)
class Item:
    """One box of a region and one class in it: where the anchor may go, how the object may
    be posed, and the sprites (allowed instances) it may be."""

    box: int
    cls: int
    position: PositionSet
    pose: Pose
    sprites: tuple


def region_items(space: Space, canvas: Canvas, region: Region, sprites: dict[int, list]) -> list[Item]:
    """Items of every box of `region` for the classes in `sprites` (class -> allowed sprites)."""
    sets = position_sets(region, canvas)
    out = []
    for k in range(region.nbox):
        pose = box_pose(space, region.lo[k], region.hi[k])
        for c in box_classes(space, region.lo[k], region.hi[k]).tolist():
            if c in sprites and sprites[c]:
                out.append(Item(k, c, sets[k], pose, tuple(sprites[c])))
    return out


# ---- exact bilinear alpha ------------------------------------------------------------------


def padded_alpha(sprite) -> np.ndarray:
    """The alpha the renderer warps (float32 a/255 in the premultiplied patch), as float64,
    with a ring of zeros: bilinear interpolation on it is exact everywhere."""
    return np.pad(sprite.premultiplied[..., 3].astype(np.float64), 1)


def bilinear(apad: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Alpha at continuous patch coordinates (x, y) (pixel centres at .5; zero outside)."""
    h, w = apad.shape
    ix = np.asarray(x, dtype=np.float64) + 0.5  # padded index: continuous - 0.5 + 1
    iy = np.asarray(y, dtype=np.float64) + 0.5
    x0 = np.clip(np.floor(ix), 0, w - 2).astype(np.intp)
    y0 = np.clip(np.floor(iy), 0, h - 2).astype(np.intp)
    fx = np.clip(ix - x0, 0.0, 1.0)
    fy = np.clip(iy - y0, 0.0, 1.0)
    top = apad[y0, x0] * (1 - fx) + apad[y0, x0 + 1] * fx
    bot = apad[y0 + 1, x0] * (1 - fx) + apad[y0 + 1, x0 + 1] * fx
    return top * (1 - fy) + bot * fy


def square_max(apad: np.ndarray, x: np.ndarray, y: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Exact largest alpha on the squares [x - d, x + d] x [y - d, y + d] with d < 1/2 (larger
    squares get +inf): bilinear interpolation is linear along each axis inside a source cell,
    so its maximum over a rectangle lies on a corner of the rectangle cut by the grid lines,
    and a square narrower than a cell meets at most one grid line per axis."""
    x, y, d = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float), np.asarray(d, float))
    # grid lines (source pixel centres) sit at continuous coordinates k + 1/2
    xs = [x - d, x + d, np.floor(x + d - 0.5) + 0.5]
    ys = [y - d, y + d, np.floor(y + d - 0.5) + 0.5]
    xs[2] = np.where(xs[2] > xs[0], xs[2], xs[0])
    ys[2] = np.where(ys[2] > ys[0], ys[2], ys[0])
    best = np.full(x.shape, -np.inf)
    for xv in xs:
        for yv in ys:
            best = np.maximum(best, bilinear(apad, xv, yv))
    return np.where(d < 0.5, best, np.inf)


class NodeMax:
    """Largest alpha on any square [x - d, x + d] x [y - d, y + d], bounded from above by the
    largest grid value of the source cells it touches (bilinear interpolation is a convex
    combination of a cell's corner values): a 2-D sparse table answers each in O(1)."""

    def __init__(self, apad: np.ndarray):
        h, w = apad.shape
        ky, kx = max(1, int(h).bit_length()), max(1, int(w).bit_length())
        st = np.zeros((ky, kx, h, w))
        st[0, 0] = apad
        for j in range(1, kx):
            step = 1 << (j - 1)
            st[0, j, :, : w - step] = np.maximum(st[0, j - 1, :, : w - step], st[0, j - 1, :, step:])
        for i in range(1, ky):
            step = 1 << (i - 1)
            st[i, :, : h - step] = np.maximum(st[i - 1, :, : h - step], st[i - 1, :, step:])
        self.st, self.h, self.w = st, h, w

    def __call__(self, x: np.ndarray, y: np.ndarray, d: np.ndarray) -> np.ndarray:
        ix, iy = x + 0.5, y + 0.5  # padded index coordinates
        # cells [i, i+1] meeting the square have corner nodes in [ceil(ix - d) - 1, floor(ix + d) + 1]
        c0 = np.ceil(ix - d) - 1
        c1 = np.floor(ix + d) + 1
        r0 = np.ceil(iy - d) - 1
        r1 = np.floor(iy + d) + 1
        outside = (c1 < 0) | (r1 < 0) | (c0 > self.w - 1) | (r0 > self.h - 1)
        c0 = np.clip(c0, 0, self.w - 1).astype(np.intp)
        c1 = np.clip(c1, 0, self.w - 1).astype(np.intp)
        r0 = np.clip(r0, 0, self.h - 1).astype(np.intp)
        r1 = np.clip(r1, 0, self.h - 1).astype(np.intp)
        kx = np.floor(np.log2(c1 - c0 + 1)).astype(np.intp)
        ky = np.floor(np.log2(r1 - r0 + 1)).astype(np.intp)
        c2 = c1 - (1 << kx) + 1
        r2 = r1 - (1 << ky) + 1
        st = self.st
        m = np.maximum(np.maximum(st[ky, kx, r0, c0], st[ky, kx, r0, c2]),
                       np.maximum(st[ky, kx, r2, c0], st[ky, kx, r2, c2]))
        return np.where(outside, 0.0, m)


def alpha_radius(sprite) -> float:
    """Beyond this distance from the anchor (source px) the bilinear alpha is exactly zero:
    the farthest corner of the open squares (i - 1, i + 1) around pixels with alpha > 0."""
    return sprite_reach(sprite.rgba[..., 3] > 0, sprite.anchor, grow=0.5)


# ---- the log-polar table of one sprite -------------------------------------------------------


@dataclass(frozen=True, eq=False)
class PolarTable:
    """Which (log radius, angle) bins about the anchor may hold alpha above the threshold."""

    l0: float  # ln rho_min
    dl: float
    nphi: int  # even, so the mirror maps bins onto bins
    rho_max: float
    core: bool  # the disc rho < rho_min may hold alpha above the threshold
    sat: dict = field(repr=False)  # mirror -> summed-area table (nl + 1, 2 nphi + 1), phi tiled twice

    @property
    def rho_min(self) -> float:
        return math.exp(self.l0)

    @property
    def dphi(self) -> float:
        return TWO_PI / self.nphi

    @property
    def nl(self) -> int:
        return self.sat[False].shape[0] - 1

    def may_meet(self, mirror: bool, r_lo: np.ndarray, r_hi: np.ndarray, phi_lo: np.ndarray,
                 width: np.ndarray) -> np.ndarray:
        """Whether {alpha > t'} (mirrored) may meet each annular sector r in [r_lo, r_hi],
        phi in [phi_lo, phi_lo + width] (source px, radians; width >= 2 pi is all round)."""
        r_lo = np.maximum(r_lo, 0.0)
        out = np.zeros(r_lo.shape, dtype=bool)
        if self.core:
            out |= r_lo <= self.rho_min
        ok = (r_lo <= self.rho_max) & (r_hi >= self.rho_min) & (r_hi >= r_lo)
        if not ok.any():
            return out
        rl, rh, pl, wd = r_lo[ok], r_hi[ok], phi_lo[ok], width[ok]
        i0 = np.floor((np.log(np.maximum(rl, self.rho_min)) - self.l0) / self.dl - 1e-9).astype(np.int64)
        i1 = np.floor((np.log(np.minimum(rh, self.rho_max)) - self.l0) / self.dl + 1e-9).astype(np.int64)
        i0 = np.clip(i0, 0, self.nl - 1)
        i1 = np.clip(i1, 0, self.nl - 1)
        d = self.dphi
        p0 = np.mod(pl, TWO_PI)
        jj0 = np.floor(p0 / d - 1e-9).astype(np.int64)
        jj1 = np.floor((p0 + wd) / d + 1e-9).astype(np.int64)
        full = (jj1 - jj0 + 1 >= self.nphi) | (wd >= TWO_PI)
        j0 = np.where(full, 0, np.mod(jj0, self.nphi))
        j1 = np.where(full, self.nphi - 1, j0 + (jj1 - jj0))
        s = self.sat[bool(mirror)]
        n = s[i1 + 1, j1 + 1] - s[i0, j1 + 1] - s[i1 + 1, j0] + s[i0, j0]
        out[ok] |= n > 0
        return out


def polar_table(sprite, threshold: float, max_scale: float, tol_px: float = BIN_TOL_PX,
                max_bins: int = MAX_BINS) -> PolarTable:
    """The sprite's table: bins of about tol_px / max_scale source px at its rim."""
    apad = padded_alpha(sprite)
    ax, ay = sprite.anchor
    t_eff = threshold - ALPHA_SLACK
    rho_max = alpha_radius(sprite)
    rho_min = min(0.1, 0.25 * rho_max) if rho_max > 0 else 0.1
    step = tol_px / (max(max_scale, 1e-9) * max(rho_max, 1.0))
    while True:
        nphi = 2 * int(math.ceil(math.pi / step))
        nl = max(1, int(math.ceil(math.log(max(rho_max, rho_min * 1.0001) / rho_min) / step)))
        if nphi * nl <= max_bins:
            break
        step *= 1.25
    dphi = TWO_PI / nphi
    l0 = math.log(rho_min)
    dl = step
    la = l0 + dl * np.arange(nl)
    rho_c = np.exp(la + dl / 2)
    rho_b = np.exp(la + dl)
    # distance from the bin's centre point to any point of its annular sector
    reach = (rho_b - rho_c) + rho_b * dphi / 2
    phi_c = dphi * (np.arange(nphi) + 0.5)
    marks = np.empty((nl, nphi), dtype=bool)
    cos, sin = np.cos(phi_c), np.sin(phi_c)
    for r0 in range(0, nl, 256):  # row blocks keep the temporaries small
        rc = rho_c[r0:r0 + 256, None]
        a = bilinear(apad, ax + rc * cos, ay - rc * sin)
        marks[r0:r0 + 256] = a + SQRT2 * reach[r0:r0 + 256, None] > t_eff
    core = bool(bilinear(apad, np.array([ax]), np.array([ay]))[0] + SQRT2 * rho_min > t_eff)
    # mirror: phi -> pi - phi maps bin j onto bin nphi/2 - 1 - j (mod nphi)
    mirrored = marks[:, np.mod(nphi // 2 - 1 - np.arange(nphi), nphi)]
    sat = {False: _sat(marks), True: _sat(mirrored)}
    return PolarTable(l0, dl, nphi, rho_max, core, sat)


def _sat(marks: np.ndarray) -> np.ndarray:
    tiled = np.concatenate([marks, marks], axis=1).astype(np.int32)
    s = np.zeros((tiled.shape[0] + 1, tiled.shape[1] + 1), dtype=np.int32)
    np.cumsum(np.cumsum(tiled, axis=0), axis=1, out=s[1:, 1:])
    return s


# ---- squares seen from a point ------------------------------------------------------------------


def square_polar(x0, y0, x1, y1):
    """For squares [x0, x1] x [y0, y1] (relative to the origin, y down): nearest and farthest
    distance, the smallest screen angle (counter-clockwise) and the angular width of the
    square as seen from the origin (2 pi when it holds or touches the origin)."""
    dmin, dmax = square_distances(x0, y0, x1, y1)
    return (dmin, dmax) + square_angles(x0, y0, x1, y1, dmin)


def square_distances(x0, y0, x1, y1):
    """Nearest and farthest distance from the origin to the squares (see `square_polar`)."""
    dmin = np.hypot(np.maximum(0.0, np.maximum(x0, -x1)), np.maximum(0.0, np.maximum(y0, -y1)))
    dmax = np.hypot(np.maximum(np.abs(x0), np.abs(x1)), np.maximum(np.abs(y0), np.abs(y1)))
    return dmin, dmax


def square_angles(x0, y0, x1, y1, dmin):
    """Smallest screen angle and angular width of the squares (see `square_polar`)."""
    ref = np.arctan2(-(y0 + y1) / 2, (x0 + x1) / 2)
    lo = np.zeros_like(ref)
    hi = np.zeros_like(ref)
    for cx, cy in ((x0, y0), (x1, y0), (x0, y1), (x1, y1)):
        d = np.mod(np.arctan2(-cy, cx) - ref + math.pi, TWO_PI) - math.pi
        lo = np.minimum(lo, d)
        hi = np.maximum(hi, d)
    width = np.where(dmin <= 1e-12, 2 * TWO_PI, hi - lo)
    return ref + lo, width


# ---- stage 2: masks ---------------------------------------------------------------------------


def offset_cells(tables: list[PolarTable], pose: Pose, h: float, block: int = 256) -> tuple[int, np.ndarray]:
    """Offset cells (side h, centred on n*h, n in [-N, N]^2, rows = y) that may meet the
    object at some pose the box allows, for any of the sprites. Returns (N, mask).
    Rows are done `block` at a time, so the temporaries stay small at any size."""
    smax = pose.max_scale
    reach = max(t.rho_max for t in tables) * smax
    n = int(math.ceil(reach / h)) + 1
    k = np.arange(-n, n + 1) * h
    half = h / 2
    mask = np.zeros((len(k), len(k)), dtype=bool)
    cx = k[None, :]
    for r0 in range(0, len(k), block):
        cy = k[r0:r0 + block, None]  # cy varies along rows
        dmin, dmax, plo, width = square_polar(cx - half, cy - half, cx + half, cy + half)
        sub = mask[r0:r0 + block]
        for tab in tables:
            for m in pose.mirrors:
                for sa, sb in pose.scales:
                    for a0, a1 in pose.angles:
                        th0, th1 = math.radians(a0), math.radians(a1)
                        todo = ~sub
                        sub[todo] |= tab.may_meet(m, dmin[todo] / sb, dmax[todo] / sa, plo[todo] - th1,
                                                  width[todo] + (th1 - th0))
    return n, mask


def _cell_bounds(ps: PositionSet, h: float, ax_range: tuple[int, int], ay_range: tuple[int, int]):
    """Index bounds (a0, a1, b0, b1) of the cells that may touch the position set, limited
    to the ranges given; None if none is left."""
    if ps.kind == "rect":
        x0, x1, y0, y1 = ps.bounds
        a0 = max(int(math.ceil(x0 / h - 1 - 1e-9)), ax_range[0])
        a1 = min(int(math.floor(x1 / h + 1e-9)), ax_range[1])
        b0 = max(int(math.ceil(y0 / h - 1 - 1e-9)), ay_range[0])
        b1 = min(int(math.floor(y1 / h + 1e-9)), ay_range[1])
    else:
        r1 = ps.bounds[1]
        ccx, ccy = ps.centre
        a0 = max(int(math.floor((ccx - r1) / h)) - 1, ax_range[0])
        a1 = min(int(math.ceil((ccx + r1) / h)) + 1, ax_range[1])
        b0 = max(int(math.floor((ccy - r1) / h)) - 1, ay_range[0])
        b1 = min(int(math.ceil((ccy + r1) / h)) + 1, ay_range[1])
    return None if a1 < a0 or b1 < b0 else (a0, a1, b0, b1)


def _sector_cells(ps: PositionSet, h: float, a0: int, a1: int, b0: int, b1: int) -> np.ndarray:
    """Which cells [a h, (a+1) h] x [b h, (b+1) h] (a0 <= a <= a1, b0 <= b <= b1) touch the sector."""
    r0, r1, p0, p1 = ps.bounds
    ccx, ccy = ps.centre
    gx, gy = np.meshgrid(np.arange(a0, a1 + 1) * h - ccx, np.arange(b0, b1 + 1) * h - ccy)
    dmin, dmax = square_distances(gx, gy, gx + h, gy + h)
    mask = (dmax >= r0 - 1e-9) & (dmin <= r1 + 1e-9)
    s0, span = math.radians(p0), math.radians(p1 - p0)
    if span >= TWO_PI - 1e-12 or not mask.any():  # a whole ring: no angle to test
        return mask
    # the angles (the costly part) only of the cells the ring keeps
    x, y = gx[mask], gy[mask]
    plo, width = square_angles(x, y, x + h, y + h, dmin[mask])
    mask[mask] = ((width >= TWO_PI) | (np.mod(plo - s0, TWO_PI) <= span + 1e-9)
                  | (np.mod(s0 - plo, TWO_PI) <= width + 1e-9))
    return mask


def row_runs(mask: np.ndarray, row0: int = 0, col0: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Maximal runs of True along the rows of a 2-D mask: (row, first col, last col) arrays
    in row-major order, offset by (row0, col0)."""
    edges = np.diff(np.pad(mask, ((0, 0), (1, 1))).view(np.int8), axis=1)
    rs, cs = np.nonzero(edges == 1)
    ce = np.nonzero(edges == -1)[1]
    return rs.astype(np.int64) + row0, cs.astype(np.int64) + col0, ce.astype(np.int64) - 1 + col0


def position_runs(ps: PositionSet, h: float, ax_range: tuple[int, int], ay_range: tuple[int, int],
                  block: int = 512):
    """The cells [a h, (a+1) h]^2 touching the position set, within the index ranges given,
    as row runs (see `row_runs`), built `block` rows at a time (a rectangle's runs directly);
    None if no cell is left."""
    bounds = _cell_bounds(ps, h, ax_range, ay_range)
    if bounds is None:
        return None
    a0, a1, b0, b1 = bounds
    if ps.kind == "rect":
        rows = np.arange(b0, b1 + 1, dtype=np.int64)
        return rows, np.full(len(rows), a0, dtype=np.int64), np.full(len(rows), a1, dtype=np.int64)
    parts = [row_runs(_sector_cells(ps, h, a0, a1, r, min(r + block - 1, b1)), r, a0)
             for r in range(b0, b1 + 1, block)]
    runs = tuple(np.concatenate(p) for p in zip(*parts))
    return runs if len(runs[0]) else None


@dataclass(frozen=True, eq=False)
class Offsets:
    """The offset cells of one (pose, sprites) pair on the grid of side 1/f: their mask
    (2n + 1 square, offset (i - n, j - n) at row i, column j) and its row runs."""

    n: int
    mask: np.ndarray = field(repr=False)
    runs: tuple = field(repr=False)


class Tables:
    """What one footprint proof computes once and reuses: per sprite, the log-polar table
    (bins sized for the largest scale of every item given), the padded alpha and its node
    maxima; the offset cells per pose and sprites; the position cells per position set.
    Sprites are keys (they compare by identity), so nothing here depends on object ids."""

    def __init__(self, items: list[Item], threshold: float, tol_px: float = BIN_TOL_PX):
        smax = max([it.pose.max_scale for it in items] or [1.0])
        self.items = list(items)
        self.polar: dict = {}
        sprites = list(dict.fromkeys(s for it in items for s in it.sprites))
        bins = max(2, min(MAX_BINS, MAX_TABLE_BINS // max(1, len(sprites))))  # a table has at least 2 bins
        for s in sprites:
            self.polar[s] = polar_table(s, threshold, smax, tol_px, bins)
        self._apad: dict = {}
        self._nodemax: dict = {}
        self._offsets: dict = {}
        self._positions: dict = {}

    def rho_max(self, sprite) -> float:
        return self.polar[sprite].rho_max

    def apad(self, sprite) -> np.ndarray:
        if sprite not in self._apad:
            self._apad[sprite] = padded_alpha(sprite)
        return self._apad[sprite]

    def nodemax(self, sprite) -> NodeMax:
        if sprite not in self._nodemax:
            self._nodemax[sprite] = NodeMax(self.apad(sprite))
        return self._nodemax[sprite]

    def positions(self, ps: PositionSet, f: int, window: tuple[int, int, int, int], n: int):
        """`position_runs` of a position set: every cell that can reach a pixel centre of the
        window through offset cells up to n (or any item's, if more) cells long. The items of
        one box, one per class, share it; a cell beyond an item's own offsets adds nothing."""
        key = (ps, f, window)
        if key not in self._positions or self._positions[key][0] < n:
            n = max([n] + [int(math.ceil(item_reach(it, self) * f)) + 2 for it in self.items])  # >= offset_cells' N
            c0, r0, c1, r1 = window
            c = (f - 1) // 2
            self._positions[key] = (n, position_runs(ps, 1.0 / f, (f * c0 + c - n, f * (c1 - 1) + c + n),
                                                     (f * r0 + c - n, f * (r1 - 1) + c + n)))
        return self._positions[key][1]

    def offsets(self, item: Item, f: int) -> Offsets:
        key = (item.pose, item.sprites, f)
        if key not in self._offsets:  # boxes of one region often share a pose
            n, mask = offset_cells([self.polar[s] for s in item.sprites], item.pose, 1.0 / f)
            self._offsets[key] = Offsets(n, mask, row_runs(mask))
        return self._offsets[key]


def make_tables(items_a: list[Item], items_b: list[Item], threshold: float, tol_px: float = BIN_TOL_PX) -> Tables:
    return Tables(list(items_a) + list(items_b), threshold, tol_px)


def item_reach(item: Item, tables: Tables) -> float:
    """How far (canvas px) from its anchor any object of the item can put alpha > 0."""
    return item.pose.max_scale * max(tables.rho_max(s) for s in item.sprites)


def item_bbox(item: Item, tables: Tables) -> tuple[float, float, float, float]:
    """(x0, y0, x1, y1) canvas px holding every pixel centre the item can cover."""
    r = item_reach(item, tables) + 1.0
    if item.position.kind == "rect":
        x0, x1, y0, y1 = item.position.bounds
    else:
        ccx, ccy = item.position.centre
        r1 = item.position.bounds[1]
        x0, x1, y0, y1 = ccx - r1, ccx + r1, ccy - r1, ccy + r1
    return x0 - r, y0 - r, x1 + r, y1 + r


def _pixel_span(lo_cell: int, hi_cell: int, f: int, lo_px: int, hi_px: int) -> tuple[int, int]:
    """Pixels p in [lo_px, hi_px) whose centre cell f p + (f - 1) / 2 lies in [lo_cell, hi_cell],
    as a half-open range (empty when the first is not below the second)."""
    c = (f - 1) // 2
    return np.maximum(-((c - lo_cell) // f), lo_px), np.minimum((hi_cell - c) // f + 1, hi_px)


def _sum_at_pixels(pos, off: Offsets, f: int, cols: tuple[int, int], rows: tuple[int, int],
                   pairs: int = 1 << 20) -> np.ndarray:
    """Pixels (rows x cols, half-open canvas ranges) whose centre cell is a position cell plus
    an offset cell: the binary dilation of the position cells by the offset cells, sampled at
    pixel centres. A position run [s, e] in row b and an offset run [q0, q1] in row i give
    exactly the cells [s + q0 - n, e + q1 - n] of row b + i - n, so each pixel row is a union
    of intervals painted at once; pixel rows go a block at a time (at most `pairs` row pairs)."""
    pb, ps_, pe = pos
    oi, oq0, oq1 = off.runs
    n, c = off.n, (f - 1) // 2
    x0, x1 = cols
    w = x1 - x0
    bmin = int(pb[0])
    counts = np.bincount(pb - bmin)
    first = np.cumsum(counts) - counts
    out = np.zeros((rows[1] - rows[0], w), dtype=bool)
    step = max(1, pairs // max(len(oi), 1))
    for y0 in range(rows[0], rows[1], step):
        ry = np.arange(y0, min(y0 + step, rows[1]))
        b = (f * ry + c)[:, None] - (oi - n)[None, :] - bmin  # position row of each (pixel row, offset run)
        ok = (b >= 0) & (b < len(counts))
        cnt = np.where(ok, counts[np.clip(b, 0, len(counts) - 1)], 0).ravel()
        pair = np.flatnonzero(cnt)
        cnt = cnt[pair]
        rep = np.repeat(np.arange(len(pair)), cnt)
        k = first[b.ravel()[pair]][rep] + (np.arange(len(rep)) - np.repeat(np.cumsum(cnt) - cnt, cnt))
        j = (pair % len(oi))[rep]
        lo, hi = _pixel_span(ps_[k] + oq0[j] - n, pe[k] + oq1[j] - n, f, x0, x1)
        yy = (pair // len(oi))[rep]
        keep = lo < hi
        yy, lo, hi = yy[keep], lo[keep], hi[keep]
        size = len(ry) * (w + 1)
        edge = (np.bincount(yy * (w + 1) + lo - x0, minlength=size)
                - np.bincount(yy * (w + 1) + hi - x0, minlength=size))
        out[y0 - rows[0]:y0 - rows[0] + len(ry)] = np.cumsum(edge.reshape(len(ry), w + 1), axis=1)[:, :w] > 0
    return out


def item_patch(item: Item, tables: Tables, window: tuple[int, int, int, int], f: int = SUPER):
    """The item's envelope (see `item_mask`) on the smallest part of the window that can
    hold any of it: (x0, y0, mask) in canvas px, or None where it holds nothing."""
    c0, r0, c1, r1 = window
    if c1 <= c0 or r1 <= r0:
        return None
    off = tables.offsets(item, f)
    n = off.n
    pos = tables.positions(item.position, f, window, n)
    if pos is None or not len(off.runs[0]):
        return None
    oi, oq0, oq1 = off.runs
    cols = _pixel_span(int(pos[1].min() + oq0.min()) - n, int(pos[2].max() + oq1.max()) - n, f, c0, c1)
    rows = _pixel_span(int(pos[0][0] + oi[0]) - n, int(pos[0][-1] + oi[-1]) - n, f, r0, r1)
    cols, rows = (int(cols[0]), int(cols[1])), (int(rows[0]), int(rows[1]))
    if cols[1] <= cols[0] or rows[1] <= rows[0]:
        return None
    return cols[0], rows[0], _sum_at_pixels(pos, off, f, cols, rows)


def item_mask(item: Item, tables: Tables, window: tuple[int, int, int, int], f: int = SUPER) -> np.ndarray:
    """Conservative footprint envelope of one item on the pixel window (c0, r0, c1, r1),
    as bool (r1 - r0, c1 - c0): False means no allowed placement covers that pixel.
    `tables` comes from `make_tables` (it also caches offset masks)."""
    c0, r0, c1, r1 = window
    out = np.zeros((max(r1 - r0, 0), max(c1 - c0, 0)), dtype=bool)
    patch = item_patch(item, tables, window, f)
    if patch is not None:
        x0, y0, m = patch
        out[y0 - r0:y0 - r0 + m.shape[0], x0 - c0:x0 - c0 + m.shape[1]] = m
    return out


# ---- stage 3: pixels, by branch and bound --------------------------------------------------------


@dataclass(frozen=True)
class Placement:
    """A concrete placement (renderer parameters) and the sprite it places."""

    sprite: object
    cx: float
    cy: float
    scale: float
    angle: float  # degrees
    mirror: bool
    item: int  # index into the item list it came from
    alpha: float  # exact bilinear alpha it puts on the pixel


@dataclass(frozen=True)
class Run:
    """n pixels in a line: (col, row) + k * (dx, dy) for k = 0 .. n - 1."""

    col: int
    row: int
    dx: int
    dy: int
    n: int

    def pixel(self, k: int) -> tuple[int, int]:
        return self.col + k * self.dx, self.row + k * self.dy

    def halves(self) -> tuple["Run", "Run"]:
        m = self.n // 2
        c, r = self.pixel(m)
        return Run(self.col, self.row, self.dx, self.dy, m), Run(c, r, self.dx, self.dy, self.n - m)


@dataclass(frozen=True)
class Reach:
    status: str  # "covered" | "excluded" | "undecided"
    # covered: a placement covering `pixel`; undecided: perhaps one whose alpha there is
    # within the renderer's rounding of the threshold (only rendering can tell)
    placement: Placement | None = None
    pixel: tuple[int, int] | None = None
    boxes: int = 0  # placement boxes evaluated


def _initial_boxes(items: list[Item], run: Run, tables: Tables):
    """One box per item, sprite, mirror, scale interval and angle interval: position (rect
    x0, x1, y0, y1 or sector r0, r1, psi0, psi1 in radians), angle, scale.

    A run is folded into the position: pixel p0 + k d with anchor c covers exactly what
    pixel p0 with anchor c - k d covers, so the run's positions are the rectangle grown
    by the run backwards (rectangles only; see `_foldable`)."""
    px, py = run.col + 0.5, run.row + 0.5
    span = run.n - 1
    rows = []
    for ii, it in enumerate(items):
        for si, s in enumerate(it.sprites):
            # only anchors within this distance of the pixel can cover it
            r = it.pose.max_scale * tables.rho_max(s) + 1e-6
            ps = it.position
            if ps.kind == "rect":
                x0, x1, y0, y1 = ps.bounds
                x0, y0 = x0 - span * run.dx, y0 - span * run.dy
                x0, x1 = max(x0, px - r), min(x1, px + r)
                y0, y1 = max(y0, py - r), min(y1, py + r)
                if x1 < x0 or y1 < y0:
                    continue
                pos = (x0, x1, y0, y1)
            else:
                if span:
                    raise ValueError("runs of pixels fold into rectangular position sets only")
                r0, r1, p0, p1 = ps.bounds
                d = math.hypot(px - ps.centre[0], py - ps.centre[1])
                r0, r1 = max(r0, d - r), min(r1, d + r)
                if r1 < r0:
                    continue
                pos = (r0, r1, math.radians(p0), math.radians(p1))
            for m in it.pose.mirrors:
                for sa, sb in it.pose.scales:
                    for a0, a1 in it.pose.angles:
                        rows.append(((ii, si, ps.kind == "sector", m),
                                     (pos[0], pos[2], math.radians(a0), sa),
                                     (pos[1], pos[3], math.radians(a1), sb)))
    return rows


def _foldable(items: list[Item], dx: int, dy: int) -> bool:
    """Runs along (dx, dy) fold exactly when every position set is a rectangle at least one
    pixel long that way (then the grown rectangles are unions of the pixels' own sets)."""
    for it in items:
        if it.position.kind != "rect":
            return False
        x0, x1, y0, y1 = it.position.bounds
        if (dx and x1 - x0 < 1.0) or (dy and y1 - y0 < 1.0):
            return False
    return True


def reach(items: list[Item], run: Run | tuple[int, int], threshold: float, tables: Tables,
          max_boxes: int = 1_000_000, batch: int = 1024) -> Reach:
    """Does some allowed placement of `items` cover a pixel of `run` (or one pixel (col, row))?

    "covered" comes with a placement and the pixel whose exact alpha exceeds the threshold
    by WITNESS_MARGIN; "excluded" is a proof that no placement covers any pixel of the run
    (see the module docstring); "undecided" when the budget runs out first."""
    if not isinstance(run, Run):
        run = Run(int(run[0]), int(run[1]), 0, 0, 1)
    rows = _initial_boxes(items, run, tables)
    if not rows:
        return Reach("excluded")
    return _BranchAndBound(items, run, threshold, tables, rows).search(max_boxes, batch)


class _BranchAndBound:
    """The placement boxes of one run and how to bound alpha on them (see the module docstring)."""

    def __init__(self, items: list[Item], run: Run, threshold: float, tables: Tables, rows: list):
        self.items, self.run, self.threshold, self.tables = items, run, threshold, tables
        self.t_eff = threshold - ALPHA_SLACK
        self.px, self.py = run.col + 0.5, run.row + 0.5
        self.meta = np.array([r[0] for r in rows], dtype=np.int64)  # item, sprite, is_sector, mirror
        self.combos = np.unique(self.meta[:, :2], axis=0)  # (item, sprite) pairs, few: evaluated group by group
        self.lo = np.array([r[1] for r in rows], dtype=np.float64)  # pos a, pos b, angle, scale
        self.hi = np.array([r[2] for r in rows], dtype=np.float64)
        self.ccx = np.array([it.position.centre[0] for it in items])
        self.ccy = np.array([it.position.centre[1] for it in items])

    def evaluate(self, lo, hi, meta):
        """Centre placement, its alpha, an upper bound of alpha on the box, split terms."""
        mid, half = (lo + hi) / 2, (hi - lo) / 2
        sector = meta[:, 2] == 1
        ccx, ccy = self.ccx[meta[:, 0]], self.ccy[meta[:, 0]]
        cx = np.where(sector, ccx + mid[:, 0] * np.cos(mid[:, 1]), mid[:, 0])
        cy = np.where(sector, ccy - mid[:, 0] * np.sin(mid[:, 1]), mid[:, 1])
        # how far the anchor can be from the box's centre point
        pos_a = half[:, 0]
        pos_b = np.where(sector, (mid[:, 0] + half[:, 0]) * half[:, 1], half[:, 1])
        e_c = np.where(sector, pos_a + pos_b, np.hypot(pos_a, pos_b))
        zx, zy = self.px - cx, self.py - cy
        th, s = mid[:, 2], mid[:, 3]
        c, sn = np.cos(th), np.sin(th)
        wx = (c * zx - sn * zy) / s
        wy = (sn * zx + c * zy) / s
        wx = np.where(meta[:, 3] == 1, -wx, wx)
        zn = np.hypot(zx, zy)
        s_lo = lo[:, 3]
        terms = np.stack([pos_a / s_lo, pos_b / s_lo, zn * half[:, 2] / s, zn * (1.0 / s_lo - 1.0 / s)], axis=1)
        dev = e_c / s_lo + terms[:, 2] + terms[:, 3]
        alpha, upper, rho_out = self._bounds(meta, wx, wy, dev)
        # beyond rho_max from the anchor the alpha is exactly zero
        upper = np.where(np.hypot(wx, wy) - dev > rho_out, 0.0, upper)
        return cx, cy, th, s, alpha, upper, terms

    def _bounds(self, meta, wx, wy, dev):
        """Alpha at the box centres (sprite coordinates anchor + (wx, wy)), the upper bound
        on each box (deviation dev), and each box's sprite radius."""
        alpha = np.zeros(len(meta))
        upper = alpha + SQRT2 * dev  # the Lipschitz bound
        rho_out = np.zeros(len(meta))
        small = dev < 0.5
        for key in self.combos:
            sel = (meta[:, 0] == key[0]) & (meta[:, 1] == key[1])
            if not sel.any():
                continue
            spr = self.items[key[0]].sprites[key[1]]
            ax, ay = spr.anchor
            apad = self.tables.apad(spr)
            alpha[sel] = bilinear(apad, ax + wx[sel], ay + wy[sel])
            upper[sel] += alpha[sel]
            rho_out[sel] = self.tables.rho_max(spr)
            # where the Lipschitz bound cannot drop the box: the largest alpha of the source
            # cells the square holding the disc of radius dev touches, and for small boxes
            # the exact maximum over that square
            big = sel & (upper > self.t_eff)
            if big.any():
                upper[big] = np.minimum(upper[big], self.tables.nodemax(spr)(ax + wx[big], ay + wy[big], dev[big]))
            sq = sel & small & (upper > self.t_eff)
            if sq.any():
                upper[sq] = np.minimum(upper[sq], square_max(apad, ax + wx[sq], ay + wy[sq], dev[sq]))
        return alpha, upper, rho_out

    def placement(self, k, cx, cy, th, s, alpha, meta):
        run, items = self.run, self.items
        ii, si = int(meta[k, 0]), int(meta[k, 1])
        step = 0
        if run.n > 1:  # unfold: the first pixel of the run whose anchor lands in the true set
            x0, x1, y0, y1 = items[ii].position.bounds
            lo_d, c_d = (x0, cx[k]) if run.dx else (y0, cy[k])
            step = min(max(int(math.ceil(lo_d - c_d - 1e-9)), 0), run.n - 1)
        pl = Placement(items[ii].sprites[si], float(cx[k]) + step * run.dx, float(cy[k]) + step * run.dy,
                       float(s[k]), math.degrees(float(th[k])), bool(meta[k, 3]), ii, float(alpha[k]))
        return pl, run.pixel(step)

    def search(self, max_boxes: int, batch: int) -> Reach:
        # best first: split the boxes with the largest upper bounds, a batch at a time, so a
        # covering placement turns up early; excluding needs every box settled either way
        threshold, t_eff = self.threshold, self.t_eff
        total = 0
        best = None  # (alpha, placement, pixel): the best placement seen
        pool = None
        clo, chi, cmeta = self.lo, self.hi, self.meta
        while True:
            total += len(clo)
            cx, cy, th, s, alpha, cup, cterms = self.evaluate(clo, chi, cmeta)
            k = int(np.argmax(alpha))
            if best is None or alpha[k] > best[0]:
                best = (float(alpha[k]),) + self.placement(k, cx, cy, th, s, alpha, cmeta)
                if best[0] > threshold + WITNESS_MARGIN:
                    return Reach("covered", best[1], best[2], total)
                if best[0] > t_eff:
                    # a placement within the renderer's rounding of the threshold: no proof can
                    # exclude the pixel, so look a little further for a clear one, then report it
                    # (its rendering decides)
                    max_boxes = min(max_boxes, total + TIE_BOXES)
            keep = cup > t_eff
            if pool is None:
                lo, hi, meta, upper, terms = clo[keep], chi[keep], cmeta[keep], cup[keep], cterms[keep]
            else:
                lo = np.concatenate([lo[pool], clo[keep]])
                hi = np.concatenate([hi[pool], chi[keep]])
                meta = np.concatenate([meta[pool], cmeta[keep]])
                upper = np.concatenate([upper[pool], cup[keep]])
                terms = np.concatenate([terms[pool], cterms[keep]])
            if not len(lo):
                return Reach("excluded", boxes=total)
            near = best[0] > threshold - TIE_BAND and upper.max() < threshold + TIE_BAND
            if total >= max_boxes or near:
                # out of budget, or the best alpha here is pinned within TIE_BAND of the threshold
                # (settling it would take ever smaller boxes): report the best placement if it is
                # close enough for the renderer to decide
                marginal = best[0] > threshold - TIE_BAND
                return Reach("undecided", best[1] if marginal else None, best[2] if marginal else None, total)
            pool, take = _best_batch(upper, batch)
            clo, chi, cmeta = _split(lo[take], hi[take], meta[take], terms[take])


def _best_batch(upper: np.ndarray, batch: int):
    """(the boxes left in the pool, the boxes to split): the largest upper bounds, a batch
    that grows with the pool so the bookkeeping stays linear in the boxes evaluated."""
    size = max(batch, len(upper) // 2)
    if len(upper) > size:
        take = np.argpartition(-upper, size)[:size]
        pool = np.ones(len(upper), dtype=bool)
        pool[take] = False
        return pool, take
    return np.zeros(len(upper), dtype=bool), np.arange(len(upper))


def _split(blo, bhi, bmeta, terms):
    """Each box cut in two across the dimension that moves u the most."""
    bhi = bhi.copy()
    dim = np.argmax(terms, axis=1)
    r_ = np.arange(len(blo))
    m = (blo[r_, dim] + bhi[r_, dim]) / 2
    lo2, hi2 = blo.copy(), bhi.copy()
    bhi[r_, dim] = m
    lo2[r_, dim] = m
    return np.concatenate([blo, lo2]), np.concatenate([bhi, hi2]), np.concatenate([bmeta, bmeta])


# ---- stages 2 and 3 together ----------------------------------------------------------------------


@dataclass
class EnvelopeCheck:
    """Outcome of comparing two regions' envelopes (placements index the item lists given)."""

    disjoint: bool  # a proof: no pixel is coverable by both
    candidates: int = 0  # pixels the rasterised envelopes share
    excluded: int = 0  # of those, pixels one side provably cannot cover
    undecided: int = 0
    boxes: int = 0  # placement boxes the branch and bound evaluated
    pairs: list = field(default_factory=list)  # (pixel, Placement a, Placement b) both covering it
    accepted: object = None  # what on_pair accepted (a verified witness), if any


def _window(items_a, items_b, tables: Tables, canvas: Canvas):
    def bbox(items):
        b = np.array([item_bbox(it, tables) for it in items])
        return b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max()

    ax0, ay0, ax1, ay1 = bbox(items_a)
    bx0, by0, bx1, by1 = bbox(items_b)
    c0 = max(0, int(math.floor(max(ax0, bx0))))
    r0 = max(0, int(math.floor(max(ay0, by0))))
    c1 = min(canvas.width, int(math.ceil(min(ax1, bx1))) + 1)
    r1 = min(canvas.height, int(math.ceil(min(ay1, by1))) + 1)
    return c0, r0, max(c1, c0), max(r1, r0)


def _runs(mask: np.ndarray, down_ok: bool, across_ok: bool) -> list[tuple[int, int, int, int, int]]:
    """Maximal straight runs of True pixels, (col, row, dx, dy, n): along columns or along
    rows (where allowed), whichever gives fewer runs; single pixels when neither is."""
    if not (down_ok or across_ok):
        return [(int(j), int(i), 0, 0, 1) for i, j in zip(*np.nonzero(mask))]
    down = row_runs(mask.T) if down_ok else None  # runs down each column: (col, first row, last row)
    across = row_runs(mask) if across_ok else None
    if across is None or (down is not None and len(down[0]) <= len(across[0])):
        return [(int(j), int(a), 0, 1, int(b - a + 1)) for j, a, b in zip(*down)]
    return [(int(a), int(i), 1, 0, int(b - a + 1)) for i, a, b in zip(*across)]


@dataclass
class _Group:
    """Items of the two sides that may meet (indices into the full item lists), their
    envelopes as patches (x0, y0, mask) or None, and the window they share."""

    a: list
    b: list
    patches_a: list
    patches_b: list
    window: tuple

    def on(self, side: str, run: Run) -> tuple[int, ...]:
        """Indices of the side's items whose envelope holds a pixel of the run."""
        idx, patches = (self.a, self.patches_a) if side == "a" else (self.b, self.patches_b)
        ks = np.arange(run.n)
        xs, ys = run.col + ks * run.dx, run.row + ks * run.dy
        return tuple(i for i, p in zip(idx, patches) if _holds(p, xs, ys))


def _holds(patch, xs: np.ndarray, ys: np.ndarray) -> bool:
    if patch is None:
        return False
    x0, y0, m = patch
    xi, yi = xs - x0, ys - y0
    ok = (xi >= 0) & (xi < m.shape[1]) & (yi >= 0) & (yi < m.shape[0])
    return bool(m[yi[ok], xi[ok]].any())


def _union(patches: list, window: tuple) -> np.ndarray:
    c0, r0, c1, r1 = window
    out = np.zeros((r1 - r0, c1 - c0), dtype=bool)
    for p in patches:
        if p is not None:
            x0, y0, m = p
            out[y0 - r0:y0 - r0 + m.shape[0], x0 - c0:x0 - c0 + m.shape[1]] |= m
    return out


class _Search:
    """Stage 3 over the shared pixels of every group: the box budget left, the answers
    already known (halving and the witness shortcut revisit pixels), and the tallies."""

    def __init__(self, items_a: list[Item], items_b: list[Item], threshold: float, tables: Tables,
                 max_boxes: int, on_pair):
        self.items = {"a": items_a, "b": items_b}
        self.threshold, self.tables, self.max_boxes, self.on_pair = threshold, tables, max_boxes, on_pair
        self.budget = max_boxes
        self.known: dict = {}  # (side, item indices, run) -> Reach
        self.out = EnvelopeCheck(disjoint=True)

    def reach(self, side: str, idx: tuple[int, ...], run: Run) -> Reach:
        key = (side, idx, run)
        if key in self.known:
            return self.known[key]
        if self.budget <= 0:
            return Reach("undecided")
        items = [self.items[side][i] for i in idx]
        r = reach(items, run, self.threshold, self.tables, max_boxes=min(self.max_boxes // 4, self.budget))
        self.budget -= r.boxes
        self.out.boxes += r.boxes
        if r.status == "undecided" and r.placement is not None:
            # alpha within the renderer's rounding of the threshold: no proof can follow, so
            # keep only a little budget to look for a witness
            self._no_proof()
        self.known[key] = r
        return r

    def _no_proof(self) -> None:
        self.budget = min(self.budget, self.max_boxes // 8)

    def pair(self, pixel, ra: Reach, idx_a: tuple, rb: Reach, idx_b: tuple) -> bool:
        """Record two placements covering `pixel` (each indexing its idx list); True when
        on_pair accepts them as a witness."""
        pa = replace(ra.placement, item=idx_a[ra.placement.item])
        pb = replace(rb.placement, item=idx_b[rb.placement.item])
        self.out.pairs.append((pixel, pa, pb))
        if self.on_pair is not None:
            w = self.on_pair(pixel, pa, pb)
            if w:
                self.out.accepted = w
                return True
        return False

    def settle(self, g: _Group, run: Run) -> bool:
        """Settle every pixel of the run; True when a witness was accepted (stop)."""
        sub_a, sub_b = g.on("a", run), g.on("b", run)
        ra = self.reach("a", sub_a, run)
        if ra.status == "excluded":
            self.out.excluded += run.n
            return False
        rb = self.reach("b", sub_b, run)
        if rb.status == "excluded":
            self.out.excluded += run.n
            return False
        if run.n == 1:
            if ra.placement is not None and rb.placement is not None:
                if self.pair(run.pixel(0), ra, sub_a, rb, sub_b):
                    return True
            self.out.undecided += 1
            self._no_proof()
            return False
        # the pixel one side covers is the likeliest witness: try the other side there first
        if self._at_pixel(g, ra, "a", sub_a) or self._at_pixel(g, rb, "b", sub_b):
            return True
        first, second = run.halves()
        return self.settle(g, first) or self.settle(g, second)

    def _at_pixel(self, g: _Group, r: Reach, known: str, sub: tuple) -> bool:
        """Where one side's placement covers a pixel, search the other side there."""
        if r.placement is None:
            return False
        one = Run(r.pixel[0], r.pixel[1], 0, 0, 1)
        here_a, here_b = g.on("a", one), g.on("b", one)
        if known == "a":
            pa, pb = _reindex(r, sub, here_a), self.reach("b", here_b, one)
        else:
            pa, pb = self.reach("a", here_a, one), _reindex(r, sub, here_b)
        return (pa is not None and pb is not None and pa.placement is not None and pb.placement is not None
                and self.pair(one.pixel(0), pa, here_a, pb, here_b))


def _groups(items_a: list[Item], items_b: list[Item], per_class: bool) -> list[tuple[list, list]]:
    """Index lists of the items that may meet: per shared class, or all of each side."""
    if per_class:
        return [([i for i, it in enumerate(items_a) if it.cls == c], [i for i, it in enumerate(items_b) if it.cls == c])
                for c in sorted({i.cls for i in items_a} & {i.cls for i in items_b})]
    return [(list(range(len(items_a))), list(range(len(items_b))))] if items_a and items_b else []


def check_envelopes(items_a: list[Item], items_b: list[Item], canvas: Canvas, threshold: float, per_class: bool,
                    on_pair=None, max_boxes: int = 4_000_000, f: int = SUPER,
                    tol_px: float = BIN_TOL_PX) -> EnvelopeCheck:
    """Stage 2 (masks) then stage 3 for two regions' items: the shared pixels, in straight
    runs (deepest first), are settled by branch and bound a run at a time, halving runs
    that neither side can exclude whole.

    `on_pair(pixel, placement_a, placement_b)` may verify a pair and return a witness; the
    search stops at the first one it accepts. `max_boxes` bounds the work of stage 3."""
    tables = make_tables(items_a, items_b, threshold, tol_px)
    search = _Search(items_a, items_b, threshold, tables, max_boxes, on_pair)
    out = search.out
    work = []  # (-depth, group, Run)
    groups = []
    for ia, ib in _groups(items_a, items_b, per_class):
        ga, gb = [items_a[i] for i in ia], [items_b[i] for i in ib]
        win = _window(ga, gb, tables, canvas)
        c0, r0, c1, r1 = win
        if c1 <= c0 or r1 <= r0:
            continue
        pa = [item_patch(it, tables, win, f) for it in ga]
        pb = [item_patch(it, tables, win, f) for it in gb]
        shared = _union(pa, win) & _union(pb, win)
        if not shared.any():
            continue
        groups.append(_Group(ia, ib, pa, pb, win))
        out.candidates += int(shared.sum())
        depth = cv2.distanceTransform(np.pad(shared, 1).astype(np.uint8), cv2.DIST_L2, 3)[1:-1, 1:-1]
        for col, row, dx, dy, n in _runs(shared, _foldable(ga + gb, 0, 1), _foldable(ga + gb, 1, 0)):
            ks = np.arange(n)
            run = Run(col + c0, row + r0, dx, dy, n)
            work.append((-float(depth[row + ks * dy, col + ks * dx].max()), len(groups) - 1, run))
    work.sort(key=lambda w: (w[0], w[2].row, w[2].col))
    for _, gi, run in work:
        if search.settle(groups[gi], run):
            break
    out.disjoint = out.accepted is None and out.excluded == out.candidates
    return out


def _reindex(r: Reach, old: tuple, new: tuple) -> Reach | None:
    """The reach with its placement indexing `new` instead of `old` (None if not there)."""
    it = old[r.placement.item]
    if it not in new:
        return None
    return replace(r, placement=replace(r.placement, item=new.index(it)))
