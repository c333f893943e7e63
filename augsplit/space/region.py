"""Regions of transform space: finite unions of disjoint axis-aligned boxes in t-space.

A region behaves like a set (`|`, `&`, `-`, `contains`, `mass`). Its boxes are always
pairwise disjoint (up to shared faces, which have zero mass), so mass is a plain sum and
exact sampling picks a box by mass. Circular intervals that wrap are stored as two boxes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .axes import Space

_EPS = 1e-12


@dataclass(frozen=True, eq=False)
class Region:
    """Disjoint boxes `lo[k] <= t <= hi[k]` (per axis, in measure coordinates) of `space`.

    The constructor trusts that the boxes are disjoint (`box` and the set operations keep
    them so); it clips them to the space and drops boxes of zero width.
    """

    space: Space
    lo: np.ndarray  # (nbox, ndim)
    hi: np.ndarray  # (nbox, ndim)
    how: str = ""  # how it was made, e.g. "band('x', at=(0, 0.3)) - cells(...)": shown by repr

    def __post_init__(self):
        lo = np.asarray(self.lo, dtype=float).reshape(-1, self.space.ndim)
        hi = np.asarray(self.hi, dtype=float).reshape(-1, self.space.ndim)
        if lo.shape != hi.shape:
            raise ValueError(f"box corners disagree: lo has shape {lo.shape}, hi has shape {hi.shape}")
        lo = np.maximum(lo, self.space.t_lo)
        hi = np.minimum(hi, self.space.t_hi)
        keep = np.all(hi - lo > _EPS, axis=1)
        lo, hi = lo[keep], hi[keep]
        lo.setflags(write=False); hi.setflags(write=False)
        object.__setattr__(self, "lo", lo)
        object.__setattr__(self, "hi", hi)

    # ---- construction -------------------------------------------------------------
    @classmethod
    def full(cls, space: Space) -> "Region":
        return cls(space, space.t_lo[None, :], space.t_hi[None, :])

    @classmethod
    def empty(cls, space: Space) -> "Region":
        return cls(space, np.zeros((0, space.ndim)), np.zeros((0, space.ndim)))

    @classmethod
    def box(cls, space: Space, intervals: dict[str, list[tuple[float, float]]]) -> "Region":
        """A box from t-intervals per axis (a list per axis = a union); missing axes span all.

        Intervals of one axis are merged first, so the product of the lists is disjoint.
        """
        unknown = sorted(set(intervals) - set(space.names))
        if unknown:
            raise ValueError(f"unknown axes {unknown}; the space has {list(space.names)}")
        per_axis = [
            np.array(_merge(intervals[n]) if n in intervals else [(space.t_lo[i], space.t_hi[i])], dtype=float).reshape(-1, 2)
            for i, n in enumerate(space.names)
        ]
        # every combination of one interval per axis is one box
        grids = np.meshgrid(*[np.arange(len(p)) for p in per_axis], indexing="ij")
        lo = np.stack([p[g.ravel(), 0] for p, g in zip(per_axis, grids)], axis=-1)
        hi = np.stack([p[g.ravel(), 1] for p, g in zip(per_axis, grids)], axis=-1)
        return cls(space, lo, hi)

    # ---- set algebra ----------------------------------------------------------------
    def _check(self, other: "Region") -> None:
        if not isinstance(other, Region):
            raise TypeError(f"cannot combine a Region with {type(other).__name__}")
        if other.space != self.space:
            raise ValueError("regions of different spaces cannot be combined")

    def __and__(self, other: "Region") -> "Region":
        # boxes of each side are disjoint, so their pairwise intersections are too
        self._check(other)
        lo = np.maximum(self.lo[:, None, :], other.lo[None, :, :]).reshape(-1, self.space.ndim)
        hi = np.minimum(self.hi[:, None, :], other.hi[None, :, :]).reshape(-1, self.space.ndim)
        return Region(self.space, lo, hi, _combined(self, "&", other))

    def __sub__(self, other: "Region") -> "Region":
        self._check(other)
        lo, hi = self.lo, self.hi
        for b_lo, b_hi in zip(other.lo, other.hi):
            if len(lo) == 0:
                break
            lo, hi = _box_difference(lo, hi, b_lo, b_hi)
        return Region(self.space, lo, hi, _combined(self, "-", other))

    def __or__(self, other: "Region") -> "Region":
        self._check(other)
        rest = other - self
        return Region(self.space, np.vstack([self.lo, rest.lo]), np.vstack([self.hi, rest.hi]), _combined(self, "|", other))

    def complement(self) -> "Region":
        return Region.full(self.space) - self

    # ---- measures and queries ------------------------------------------------------------
    @property
    def nbox(self) -> int:
        return len(self.lo)

    def box_masses(self) -> np.ndarray:
        """Mass of each box as a fraction of the whole space (product of the axes' measures)."""
        return np.prod((self.hi - self.lo) / self.space.t_span, axis=1)

    def cumulative_share(self) -> np.ndarray:
        """Cumulative box masses over the total (how exact sampling picks a box), made once."""
        cum = self.__dict__.get("_cumulative")
        if cum is None:
            cum = np.cumsum(self.box_masses())
            cum = cum / cum[-1]
            cum.setflags(write=False)
            object.__setattr__(self, "_cumulative", cum)
        return cum

    def mass(self) -> float:
        return float(self.box_masses().sum())

    def is_empty(self) -> bool:
        return self.nbox == 0

    def contains_t(self, t: np.ndarray, chunk: int = 1 << 18) -> np.ndarray:
        """Membership of N points given in t (closed boxes); NaN coordinates are outside.

        On a circular axis the two ends of the range are one point, so a point on the seam
        belongs to boxes touching it from either side. Work is cut into chunks of about
        `chunk` point-box pairs, so memory stays bounded for any N.
        """
        out = np.zeros(len(self.space.as_points(t)), dtype=bool)
        for rows, inside in self._inside_chunks(t, chunk):
            out[rows] = inside.any(axis=1)
        return out

    def box_of_t(self, t: np.ndarray, chunk: int = 1 << 18) -> np.ndarray:
        """Index of the first box holding each point (as `contains_t` decides), -1 where none."""
        out = np.full(len(self.space.as_points(t)), -1, dtype=np.int64)
        for rows, inside in self._inside_chunks(t, chunk):
            k = inside.argmax(axis=1)
            out[rows] = np.where(inside[np.arange(len(k)), k], k, -1)
        return out

    def _inside_chunks(self, t, chunk: int):
        """Yield (slice of points, bool (n, nbox) membership) chunk by chunk."""
        sp = self.space
        t = sp.as_points(t)
        if self.nbox == 0 or len(t) == 0:
            return
        tol = 1e-9 * np.maximum(1.0, np.abs(sp.t_span))
        lo, hi = self.lo - tol, self.hi + tol
        # boxes that touch a circular axis's seam (at its low or high end)
        at_lo = sp.periodic & (self.lo <= sp.t_lo + tol)
        at_hi = sp.periodic & (self.hi >= sp.t_hi - tol)
        seam = [i for i in range(sp.ndim) if at_lo[:, i].any() or at_hi[:, i].any()]
        step = max(1, chunk // self.nbox)
        for s in range(0, len(t), step):
            p = t[s : s + step]
            p = np.where(sp.periodic, sp.t_lo + np.mod(p - sp.t_lo, sp.t_span), p)
            inside = np.ones((len(p), self.nbox), dtype=bool)
            for i in range(sp.ndim):
                c = p[:, i, None]
                ok = (c >= lo[:, i]) & (c <= hi[:, i])
                if i in seam:
                    ok |= ((c <= sp.t_lo[i] + tol[i]) & at_hi[:, i]) | ((c >= sp.t_hi[i] - tol[i]) & at_lo[:, i])
                inside &= ok
            yield slice(s, s + len(p)), inside

    def contains(self, points) -> np.ndarray:
        """Membership of points given in axis units: {axis: array} or an (N, ndim) array."""
        return self.contains_t(self.space.to_t(points))

    def restrict(self, name: str, lo_t: float, hi_t: float) -> "Region":
        """The part of the region whose axis `name` lies in the t-interval [lo_t, hi_t]."""
        i = self.space.index[name]
        lo = self.space.t_lo.copy(); hi = self.space.t_hi.copy()
        lo[i], hi[i] = lo_t, hi_t
        return self & Region(self.space, lo[None], hi[None])

    def axis_extent(self, name: str) -> tuple[float, float] | None:
        """Smallest and largest t the region reaches on one axis, None when empty."""
        if self.nbox == 0:
            return None
        i = self.space.index[name]
        return float(self.lo[:, i].min()), float(self.hi[:, i].max())

    def simplify(self) -> "Region":
        """The same set in fewer boxes: merge boxes that are equal on all axes but one and
        touch along it, axis after axis, until nothing changes."""
        lo, hi = self.lo, self.hi
        changed = True
        while changed:
            changed = False
            for i in range(self.space.ndim):
                lo, hi, merged = _merge_along(lo, hi, i)
                changed |= merged
        return Region(self.space, lo, hi)

    def with_how(self, how: str) -> "Region":
        """The same region, shown as made by `how`."""
        return Region(self.space, self.lo, self.hi, how)

    # ---- value equality -------------------------------------------------------------------
    def canonical(self) -> tuple:
        """The region as a set, independent of how it is cut into boxes: per axis the cuts
        that really bound it (t rounded to 1e-9), and which cells of that grid it fills.
        Equal sets (up to faces of zero mass) have equal canonical forms."""
        cached = self.__dict__.get("_canonical")
        if cached is None:
            cached = _canonical(self)
            object.__setattr__(self, "_canonical", cached)
        return cached

    def __eq__(self, other) -> bool:
        if not isinstance(other, Region):
            return NotImplemented
        return self.space == other.space and self.canonical() == other.canonical()

    def __hash__(self) -> int:
        return hash((self.space, self.canonical()))

    def __repr__(self) -> str:
        made = self.how if len(self.how) <= 200 else self.how[:197] + "..."
        return (f"Region({made + '; ' if made else ''}{self.nbox} boxes over {', '.join(self.space.names)}, "
                f"mass={self.mass():.4g})")


def _combined(a: Region, op: str, b: Region) -> str:
    if not (a.how and b.how):
        return ""
    wrap = lambda h: f"({h})" if any(f" {o} " in h for o in "|&-") else h  # noqa: E731
    return f"{wrap(a.how)} {op} {wrap(b.how)}"


_DIGITS = 9  # cuts closer than 1e-9 in t are one cut (t spans are O(1)..O(1000))
MAX_CANONICAL_CELLS = 1 << 22


def _canonical(r: Region) -> tuple:
    sp = r.space
    lo, hi = np.round(r.lo, _DIGITS), np.round(r.hi, _DIGITS)
    ends = np.round(np.stack([sp.t_lo, sp.t_hi], axis=1), _DIGITS)
    cuts = [np.unique(np.r_[lo[:, i], hi[:, i], ends[i]]) for i in range(sp.ndim)]
    shape = tuple(len(c) - 1 for c in cuts)
    if int(np.prod(shape, dtype=float)) > MAX_CANONICAL_CELLS:
        raise ValueError(f"region of {r.nbox} boxes is too finely cut to compare ({'x'.join(map(str, shape))} cells)")
    occ = np.zeros(shape, dtype=bool)
    for b in range(r.nbox):
        occ[tuple(slice(np.searchsorted(c, lo[b, i]), np.searchsorted(c, hi[b, i])) for i, c in enumerate(cuts))] = True
    # drop the cuts that bound nothing: the cells on either side are filled alike
    for i in range(sp.ndim):
        keep = [0] + [j for j in range(1, occ.shape[i]) if not np.array_equal(np.take(occ, j - 1, axis=i),
                                                                             np.take(occ, j, axis=i))]
        occ = np.take(occ, keep, axis=i)
        cuts[i] = np.r_[cuts[i][keep], cuts[i][-1]]
    return tuple(tuple(c.tolist()) for c in cuts), occ.shape, occ.tobytes()


def _merge(ivs) -> list[tuple[float, float]]:
    """Sorted union of 1-D intervals (touching ones joined; empty or reversed ones dropped)."""
    out: list[list[float]] = []
    for a, b in sorted((float(a), float(b)) for a, b in ivs):
        if b - a <= _EPS:
            continue
        if out and a <= out[-1][1] + _EPS:
            out[-1][1] = max(out[-1][1], b)
        else:
            out.append([a, b])
    return [(a, b) for a, b in out]


def _merge_along(lo: np.ndarray, hi: np.ndarray, i: int):
    """Join boxes that are equal on every axis but `i` and touch along `i`."""
    if len(lo) < 2:
        return lo, hi, False
    rest = np.delete(np.hstack([lo, hi]), [i, lo.shape[1] + i], axis=1)
    order = np.lexsort((lo[:, i],) + tuple(rest.T[::-1]))  # group by the other axes, then by lo_i
    lo, hi, rest = lo[order], hi[order], rest[order]
    # disjoint boxes of one group cannot overlap along i, so touching ones chain in order
    joins = np.all(rest[1:] == rest[:-1], axis=1) & (np.abs(lo[1:, i] - hi[:-1, i]) <= _EPS)
    if not joins.any():
        return lo, hi, False
    first = np.flatnonzero(np.r_[True, ~joins])
    last = np.r_[first[1:] - 1, len(lo) - 1]
    new_lo, new_hi = lo[first].copy(), hi[first].copy()
    new_hi[:, i] = hi[last, i]
    return new_lo, new_hi, True


def _box_difference(lo: np.ndarray, hi: np.ndarray, b_lo: np.ndarray, b_hi: np.ndarray):
    """Boxes (lo, hi) minus one box, as disjoint boxes. Vectorised over the first argument.

    Slab decomposition: along axis k keep the parts of A below and above B, with axes < k
    already clipped to B; what is left after all axes lies inside B and is dropped.
    """
    touches = np.all((lo < b_hi - _EPS) & (hi > b_lo + _EPS), axis=1)
    out_lo, out_hi = [lo[~touches]], [hi[~touches]]
    cur_lo, cur_hi = lo[touches].copy(), hi[touches].copy()
    for k in range(lo.shape[1]):
        below_lo, below_hi = cur_lo.copy(), cur_hi.copy()
        below_hi[:, k] = np.minimum(cur_hi[:, k], b_lo[k])
        above_lo, above_hi = cur_lo.copy(), cur_hi.copy()
        above_lo[:, k] = np.maximum(cur_lo[:, k], b_hi[k])
        out_lo += [below_lo, above_lo]
        out_hi += [below_hi, above_hi]
        cur_lo[:, k] = np.maximum(cur_lo[:, k], b_lo[k])
        cur_hi[:, k] = np.minimum(cur_hi[:, k], b_hi[k])
    lo2, hi2 = np.vstack(out_lo), np.vstack(out_hi)
    keep = np.all(hi2 - lo2 > _EPS, axis=1)
    return lo2[keep], hi2[keep]
