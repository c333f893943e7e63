"""Region builders as Python values: `box`, `band`, `cells`, `of_classes`, `by_class`.

Each returns a Region of a given Space (values in the axes' own units, as a spec writes them)
that remembers how it was made (its repr). The YAML region language (plan/regions.py) calls
these same functions, so a region written in Python and the same region written in a spec
are equal (`==` compares the sets). Bad arguments raise ValueError naming what is wrong; the
YAML side adds the key path.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from numbers import Real

import numpy as np

from ..limits import MAX_GRID_CELLS
from .axes import CLASS, LEVELS, Axis, Space
from .region import Region

OTHER_CLASS = "*"  # by_class's name for every class it does not name
PICKS = ("all", "checkerboard", "checkerboard_odd")


def _num(v) -> bool:
    return isinstance(v, (Real, np.number)) and not isinstance(v, (bool, np.bool_))


def _fmt(v) -> str:
    return f"{v:g}" if _num(v) else repr(v)


def interval_pairs(axis: Axis, value) -> list[tuple[float, float]]:
    """A level value, an interval (a, b) or a list of intervals -> the list of (a, b)."""
    if _num(value):
        if axis.measure != LEVELS:
            raise ValueError("an interval is [low, high] (or a list of them)")
        return [(float(value), float(value))]
    if isinstance(value, Sequence) and not isinstance(value, str) and len(value) == 2 and all(_num(v) for v in value):
        return [(float(value[0]), float(value[1]))]
    if isinstance(value, Sequence) and not isinstance(value, str) and value and all(
            isinstance(p, Sequence) and not isinstance(p, str) for p in value):
        out = []
        for p in value:
            if len(p) != 2 or not all(_num(v) for v in p):
                raise ValueError("an interval is [low, high] with two numbers")
            out.append((float(p[0]), float(p[1])))
        return out
    raise ValueError("an interval is [low, high] (or a list of them)")


def pair_to_t(axis: Axis, pair: tuple[float, float]) -> list[tuple[float, float]]:
    """One interval in axis units -> t-intervals (a circular one may wrap into two)."""
    return axis.interval_to_t(pair[0], pair[1])


def box(space: Space, intervals: Mapping | None = None, /, **by_name) -> Region:
    """The region where each named axis lies in its interval(s), in axis units; an axis left
    out spans its whole range. `box(space, x=(0, 5), angle=[(330, 30)])` or
    `box(space, {"x": (0, 5)})`. A circular interval may wrap ([330, 30]); a levels axis
    takes a level value or an interval of levels."""
    given = {**(dict(intervals) if intervals else {}), **by_name}
    ivs = {}
    for name, value in given.items():
        if name not in space.names or name == CLASS:
            raise ValueError(f"unknown axis '{name}'; the space has {[n for n in space.names if n != CLASS]}")
        ivs[name] = [t for p in interval_pairs(space[name], value) for t in pair_to_t(space[name], p)]
    shown = ", ".join(f"{n}={_show_value(v)}" for n, v in given.items())
    return Region.box(space, ivs).with_how(f"box({shown})")


def _show_value(v) -> str:
    if _num(v):
        return _fmt(v)
    if len(v) == 2 and all(_num(x) for x in v):
        return f"({_fmt(v[0])}, {_fmt(v[1])})"
    return "[" + ", ".join(_show_value(p) for p in v) + "]"


def band(space: Space, axis: str, at: tuple[float, float]) -> Region:
    """The slab of one axis between fractions at[0] < at[1] of its range (normalised units,
    in the measure coordinate: a log axis is cut in log)."""
    if axis not in space.names or axis == CLASS:
        raise ValueError(f"unknown axis '{axis}'")
    if not (isinstance(at, Sequence) and len(at) == 2 and all(_num(v) for v in at) and 0 <= at[0] < at[1] <= 1):
        raise ValueError("at must be [f0, f1] with 0 <= f0 < f1 <= 1")
    i = space.index[axis]
    lo, span = space.t_lo[i], space.t_span[i]
    iv = whole_levels(space[axis], lo + at[0] * span, lo + at[1] * span)
    if iv is None:
        n = len(space[axis].levels)
        raise ValueError(f"the band holds none of the levels of axis '{axis}' ({n} levels, each 1/{n} of the "
                         "normalised range)")
    r = Region.box(space, {axis: [iv]})
    return r.with_how(f"band({axis!r}, at=({_fmt(at[0])}, {_fmt(at[1])}))")


def whole_levels(axis: Axis, lo_t: float, hi_t: float) -> tuple[float, float] | None:
    """On a levels axis a box spans whole level cells (space/sample.py draws whole cells): the
    levels whose index lies in [lo_t, hi_t), as one box, or None if no level does. Other
    axes: the interval as it is."""
    if axis.measure != LEVELS:
        return (lo_t, hi_t)
    k0, k1 = math.ceil(lo_t - 1e-9), math.ceil(hi_t - 1e-9) - 1
    return (k0 - 0.5, k1 + 0.5) if k0 <= k1 else None


def check_grid_size(shape: Sequence[int]) -> None:
    n_cells = math.prod(shape)
    if n_cells > MAX_GRID_CELLS:
        raise ValueError(f"a grid of {' x '.join(map(str, shape))} = {n_cells:,} cells is above the limit of "
                         f"{MAX_GRID_CELLS:,} (limits.MAX_GRID_CELLS)")


def grid_cells(shape: Sequence[int], pick) -> list[tuple[int, ...]]:
    """The cells `pick` names in a grid of `shape`: 'all', 'checkerboard' (even index sum),
    'checkerboard_odd', or a list of cell indices (an int for a one-axis grid)."""
    all_cells = [tuple(int(v) for v in c) for c in np.ndindex(*shape)]
    if isinstance(pick, str):
        if pick not in PICKS:
            raise ValueError("pick is a list of cell indices, 'checkerboard', 'checkerboard_odd' or 'all'")
        if pick == "all":
            return all_cells
        parity = 0 if pick == "checkerboard" else 1
        return [c for c in all_cells if sum(c) % 2 == parity]
    if not (isinstance(pick, Sequence) and pick):
        raise ValueError("pick is a list of cell indices, 'checkerboard', 'checkerboard_odd' or 'all'")
    chosen = []
    for c in pick:
        c = [c] if _num(c) else list(c)
        if not (len(c) == len(shape) and all(isinstance(v, (int, np.integer)) and not isinstance(v, bool)
                                             and 0 <= v < s for v, s in zip(c, shape))):
            raise ValueError(f"cell {c} is not an index into a grid of {list(shape)}")
        chosen.append(tuple(int(v) for v in c))
    return list(dict.fromkeys(chosen))  # a cell picked twice is one box


def cells(space: Space, grid: Mapping[str, int], pick="all") -> Region:
    """The union of grid cells: each axis of `grid` cut into that many equal bins (in the
    measure coordinate), the cells chosen by `pick` (see `grid_cells`)."""
    if not (isinstance(grid, Mapping) and grid):
        raise ValueError("grid maps axis names to numbers of bins")
    names = list(grid)
    for n in names:
        if n not in space.names or n == CLASS:
            raise ValueError(f"unknown axis '{n}'")
        if not (isinstance(grid[n], (int, np.integer)) and not isinstance(grid[n], bool) and grid[n] >= 1):
            raise ValueError(f"the number of bins of {n} must be a positive integer")
    shape = [int(grid[n]) for n in names]
    check_grid_size(shape)
    chosen = grid_cells(shape, pick)
    # the cells of one grid are disjoint boxes already: build them at once (a union per cell
    # would cost time quadratic in their number)
    lo = np.repeat(space.t_lo[None, :], len(chosen), axis=0)
    hi = np.repeat(space.t_hi[None, :], len(chosen), axis=0)
    keep = np.ones(len(chosen), dtype=bool)
    for r, cell in enumerate(chosen):
        for n, k, s in zip(names, cell, shape):
            i = space.index[n]
            iv = whole_levels(space[n], space.t_lo[i] + space.t_span[i] * k / s,
                              space.t_lo[i] + space.t_span[i] * (k + 1) / s)
            if iv is None:  # a bin between two levels holds nothing to draw
                if not isinstance(pick, str):
                    raise ValueError(f"cell {list(cell)} holds none of the levels of axis '{n}'")
                keep[r] = False
                break
            lo[r, i], hi[r, i] = iv
    out = Region(space, lo[keep], hi[keep])
    shown = pick if isinstance(pick, str) else [list(c) if not _num(c) else c for c in pick]
    return out.with_how(f"cells({dict(grid)!r}, pick={shown!r})")


def of_classes(space: Space, classes: Sequence[str], names) -> Region:
    """The region of the given class names (one name or a list), every other axis whole."""
    names = [names] if isinstance(names, str) else list(names)
    if not names:
        raise ValueError("give a class name or a list of class names")
    unknown = [n for n in names if n not in classes]
    if unknown:
        raise ValueError(f"unknown class '{unknown[0]}'")
    idx = [list(classes).index(n) for n in names]
    shown = repr(names[0]) if len(names) == 1 else repr(names)
    return Region.box(space, {CLASS: [(i - 0.5, i + 0.5) for i in idx]}).with_how(f"of_classes({shown})")


def by_class(space: Space, classes: Sequence[str], parts: Mapping[str, Region]) -> Region:
    """A region per class: `parts` maps class names (or OTHER_CLASS, '*', for every class not
    named) to regions; the result holds each class's part for that class only."""
    if not (isinstance(parts, Mapping) and parts):
        raise ValueError("by_class maps class names (or '*') to regions")
    out = Region.empty(space)
    named = [n for n in parts if n != OTHER_CLASS]
    for name in named:
        out = out | (parts[name] & of_classes(space, classes, name))
    if OTHER_CLASS in parts:
        rest = [c for c in classes if c not in named]
        if rest:
            out = out | (parts[OTHER_CLASS] & of_classes(space, classes, rest))
    shown = ", ".join(f"{n!r}: {parts[n].how or '...'}" for n in parts)
    return out.with_how(f"by_class({{{shown}}})")
