"""Exact sampling from regions.

A draw never loops: pick a disjoint box with probability proportional to its mass, then
map one uniform per axis through that box's inverse CDF (uniform in t, i.e. uniform,
log-uniform or uniform-on-the-circle in axis units). The uniforms come from the streams of
streams.py.
"""

from __future__ import annotations

import numpy as np

from .region import Region


def sample_t(region: Region, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Map uniforms (N, ndim + 1) to points of `region` in t, and the box each came from.

    Column 0 picks the box by mass; columns 1.. place the point inside it. Uniform in t is
    uniform, log-uniform or uniform-on-the-circle in axis units, and on a levels axis every
    level of a box is equally likely (each owns a unit cell of t).
    """
    if region.is_empty():
        raise ValueError("cannot sample from an empty region")
    u = _uniforms(region.space, u)
    box = _pick(region, u[:, 0])
    return _place(region.space, region.lo[box], region.hi[box], u[:, 1:]), box


class StackedRegions:
    """The boxes of several regions (of one space) in one table, so that rows drawn from
    different regions are sampled in one pass (`sample_t_each`), whatever their number.

    Each region's cumulative box shares are stored as complex keys k + i*share (k the
    region's number, exact in both parts). numpy orders complex numbers lexicographically,
    real part first (numpy.sort documentation, "the sort order for complex numbers is
    lexicographic"), so one searchsorted of k + i*u counts the boxes of regions before k plus
    those of region k whose share is <= u: the pick `sample_t` makes in region k alone."""

    def __init__(self, regions):
        regions = list(regions)
        self.space = regions[0].space
        counts = np.array([r.nbox for r in regions], dtype=np.int64)
        self.start = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
        self.last = self.start + counts - 1  # the last box of each region (start - 1 when empty)
        self.empty = counts == 0
        self.lo = np.concatenate([r.lo.reshape(-1, self.space.ndim) for r in regions])
        self.hi = np.concatenate([r.hi.reshape(-1, self.space.ndim) for r in regions])
        self.keys = _tagged(np.repeat(np.arange(len(regions), dtype=float), counts),
                            np.concatenate([r.cumulative_share() for r in regions if r.nbox] or [np.zeros(0)]))

    def pick(self, which: np.ndarray, u0: np.ndarray) -> np.ndarray:
        """Row index into lo / hi of each uniform's box in its own region (see `_pick`)."""
        if self.empty[which].any():
            raise ValueError("cannot sample from an empty region")
        at = np.searchsorted(self.keys, _tagged(which.astype(float), u0), side="right")
        return np.minimum(at, self.last[which])


def _tagged(real: np.ndarray, imag: np.ndarray) -> np.ndarray:
    out = np.empty(len(real), dtype=complex)
    out.real, out.imag = real, imag
    return out


def sample_t_each(regions, which: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Points in t: row i sampled from regions[which[i]] exactly as `sample_t` would sample
    it (the same numbers), every row in one pass. `regions` is a StackedRegions (made once by
    a caller that samples often) or a sequence of regions."""
    stack = regions if isinstance(regions, StackedRegions) else StackedRegions(regions)
    which = np.asarray(which, dtype=np.int64)
    u = _uniforms(stack.space, u)
    box = stack.pick(which, u[:, 0])
    return _place(stack.space, stack.lo[box], stack.hi[box], u[:, 1:])


def _uniforms(space, u) -> np.ndarray:
    u = np.asarray(u, dtype=float)
    n_col = space.ndim + 1
    if u.ndim == 1 and u.size == n_col:
        u = u[None, :]
    if u.ndim != 2 or u.shape[1] != n_col:
        raise ValueError(f"expected uniforms of shape (N, {n_col}) (one for the box, one per axis), got shape {u.shape}")
    if not np.all((u >= 0) & (u <= 1)):
        raise ValueError("uniforms must lie in [0, 1]")
    return u


def _pick(region: Region, u0: np.ndarray) -> np.ndarray:
    """The box of each uniform: u0 in [0, 1) falls in box k with probability mass_k / total;
    u0 = 1 goes to the last box."""
    return np.minimum(np.searchsorted(region.cumulative_share(), u0, side="right"), region.nbox - 1)


def _place(space, lo: np.ndarray, hi: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Points of the boxes (lo, hi), one uniform per axis."""
    t = lo + u * (hi - lo)
    levels = space.discrete
    if levels.any():
        # a levels box spans whole unit cells: pick one cell evenly and return its exact
        # index, so no draw can land on a cell face and round to a level outside the box
        n = np.maximum(np.rint(hi - lo), 1.0)
        t = np.where(levels, np.rint(lo + 0.5) + np.minimum(np.floor(u * n), n - 1), t)
    return t


def sample(region: Region, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """As `sample_t`, with points in axis units (levels axes give exact level values)."""
    t, box = sample_t(region, u)
    return region.space.from_t(t), box
