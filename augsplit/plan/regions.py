"""Spec axes -> a Space, and the spec's region language -> Regions.

A region node is a mapping whose terms are intersected, then `minus` is taken away:
  axis: [a, b] | [[a, b], [c, d]] | level      an interval (or a union) of one axis
  class: name | [names]                         some classes
  any_of: [node, ...] / all_of: [node, ...]     union / intersection
  band: {axis: scale, at: [0.75, 1.0]}          an interval given in normalised units of an axis
  cells: {grid: {x: 3, y: 3}, pick: [[0, 0], [2, 1]] | checkerboard | checkerboard_odd | all}
  by_class: {class_name: node, ..., '*': node}  a region per class ('*' = every class not named)
  split: name                                   another split's region
  minus: node
An empty mapping (or no region at all) is the whole space.
"""

from __future__ import annotations

import math
from typing import Any, Callable

import numpy as np

from ..errors import SpecError
from ..space.axes import BUILTIN, CIRCULAR, LEVELS, LINEAR, LOG, Axis, Space
from ..space.region import Region
from ..spec import Spec, _hint
from ..units import Canvas

CLASS = "class"


def build_space(spec: Spec, canvas: Canvas, classes: tuple[str, ...]) -> Space:
    """The spec's axes (in spec order, polar_angle added beside a lone eccentricity) + class."""
    axes = []
    names = list(spec.axes)
    if "eccentricity" in names and "polar_angle" not in names:
        names.append("polar_angle")
    for name in names:
        axes.append(_axis(name, spec.axes.get(name), spec, canvas))
    axes.append(Axis(CLASS, 0, max(len(classes) - 1, 0), LEVELS, "", tuple(float(i) for i in range(len(classes)))))
    return Space(axes)


def _axis(name: str, a, spec: Spec, canvas: Canvas) -> Axis:
    kind = BUILTIN[name]
    where = f"axes.{name}"
    unit = a.unit if a is not None and a.unit is not None else _default_unit(kind)
    if unit not in kind.units:
        raise SpecError(f"unit '{unit}' is not one of {', '.join(repr(u) for u in kind.units)}", where=f"{where}.unit")
    if unit == "deg" and name in ("x", "y", "eccentricity") and spec.viewing is None:
        raise SpecError("unit 'deg' needs viewing geometry", where=f"{where}.unit",
                        hint="add viewing: {distance_cm: 57, px_per_cm: 38}")
    if a is not None and a.levels is not None:
        lv = sorted(set(float(v) for v in a.levels))
        if not lv:
            raise SpecError("levels must not be empty", where=f"{where}.levels")
        if name == "mirror" and not set(lv) <= {0.0, 1.0}:
            raise SpecError("mirror levels are 0 and/or 1", where=f"{where}.levels")
        if name == "scale" and lv[0] <= 0:
            raise SpecError("scale must be positive", where=f"{where}.levels")
        return Axis(name, lv[0], lv[-1], LEVELS, unit, tuple(lv))
    rng = a.range if a is not None and a.range is not None else _default_range(kind, unit, canvas, where)
    lo, hi = float(rng[0]), float(rng[1])
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        raise SpecError(f"range [{lo:g}, {hi:g}] is empty", where=f"{where}.range")
    if name == "scale" and lo <= 0:
        raise SpecError(f"scale must be positive, got range [{lo:g}, {hi:g}]", where=f"{where}.range")
    if name in ("saturation", "brightness", "eccentricity") and lo < 0:
        raise SpecError(f"{name} cannot be negative, got range [{lo:g}, {hi:g}]", where=f"{where}.range")
    if unit == "deg" and name in ("x", "y", "eccentricity") and max(abs(lo), abs(hi)) >= 90:
        raise SpecError("visual angles must lie within (-90, 90) degrees", where=f"{where}.range")
    dist = a.dist if a is not None else "uniform"
    if name == "mirror":
        levels = tuple(v for v in (0.0, 1.0) if lo <= v <= hi)
        if not levels:
            raise SpecError(f"mirror range [{lo:g}, {hi:g}] holds neither 0 nor 1", where=f"{where}.range")
        return Axis(name, levels[0], levels[-1], LEVELS, unit, levels)
    if dist == "log":
        if lo <= 0:
            raise SpecError("dist: log needs a positive range", where=f"{where}.range")
        return Axis(name, lo, hi, LOG, unit)
    if kind.measure == CIRCULAR and abs((hi - lo) - 360.0) < 1e-9:
        return Axis(name, lo, hi, CIRCULAR, unit)
    return Axis(name, lo, hi, LINEAR, unit)


def _default_unit(kind) -> str:
    return "px" if "px" in kind.units else kind.units[0]


def _default_range(kind, unit: str, canvas: Canvas, where: str) -> tuple[float, float]:
    if kind.role == "position":
        ext = canvas.width if kind.name == "x" else canvas.height
        if unit == "px":
            return (0.0, float(ext))
        if unit == "frac":
            return (0.0, 1.0)
        h = canvas.half_field_deg(kind.name)
        return (-h, h)
    if kind.name == "eccentricity":
        r = math.hypot(canvas.width, canvas.height) / 2.0
        return (0.0, float(canvas.radius_from_px(unit, r)))
    if kind.default_range is None or kind.default_range[0] == kind.default_range[1]:
        raise SpecError("a range is required", where=f"{where}.range")
    return kind.default_range


# ---- the region language ---------------------------------------------------------------

_NODE_KEYS = ("any_of", "all_of", "band", "cells", "by_class", "split", "minus", CLASS)


def build_region(node: Any, space: Space, classes: tuple[str, ...], where: str,
                 split_region: Callable[[str, str], Region] | None = None) -> Region:
    """Evaluate one region node (see the module docstring) to a Region."""
    full = Region.full(space)
    if node is None:
        return full
    if not isinstance(node, dict):
        raise SpecError(f"a region is a mapping (axis: interval, any_of, minus, ...), not {type(node).__name__}", where=where)
    out = full
    for key, value in node.items():
        sub = f"{where}.{key}"
        if key == "minus":
            continue
        if key in space.names and key != CLASS:
            out = out & Region.box(space, {key: _intervals(space[key], value, sub)})
        elif key == CLASS:
            out = out & _classes_region(space, classes, value, sub)
        elif key in ("any_of", "all_of"):
            if not isinstance(value, list) or not value:
                raise SpecError(f"{key} takes a non-empty list of regions", where=sub)
            parts = [build_region(v, space, classes, f"{sub}.{i}", split_region) for i, v in enumerate(value)]
            acc = parts[0]
            for p in parts[1:]:
                acc = (acc | p) if key == "any_of" else (acc & p)
            out = out & acc
        elif key == "band":
            out = out & _band(space, value, sub)
        elif key == "cells":
            out = out & _cells(space, value, sub)
        elif key == "by_class":
            out = out & _by_class(space, classes, value, sub, split_region)
        elif key == "split":
            if split_region is None:
                raise SpecError("'split' cannot be used here", where=sub)
            out = out & split_region(str(value), sub)
        else:
            known = [n for n in space.names if n != CLASS] + list(_NODE_KEYS)
            if key in BUILTIN:
                raise SpecError(f"axis '{key}' is not among the spec's axes ({', '.join(n for n in space.names if n != CLASS)})", where=sub,
                                hint="add it under axes: to vary it")
            hint = _hint(key, known)
            raise SpecError(f"unknown region key '{key}'" + (f" ({hint})" if hint else ""), where=sub)
    if "minus" in node:
        out = out - build_region(node["minus"], space, classes, f"{where}.minus", split_region)
    return out


def _intervals(axis: Axis, value: Any, where: str) -> list[tuple[float, float]]:
    """[a, b], [[a, b], ...] or a single level -> t-intervals of the axis."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        value = [value, value] if axis.measure == LEVELS else None
    if (isinstance(value, list) and len(value) == 2 and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
        pairs = [value]
    elif isinstance(value, list) and value and all(isinstance(v, list) for v in value):
        pairs = value
    else:
        raise SpecError("an interval is [low, high] (or a list of them)", where=where)
    out = []
    for i, pair in enumerate(pairs):
        w = where if len(pairs) == 1 else f"{where}.{i}"
        if len(pair) != 2 or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in pair):
            raise SpecError("an interval is [low, high] with two numbers", where=w)
        try:
            out += axis.interval_to_t(float(pair[0]), float(pair[1]))
        except ValueError as exc:
            raise SpecError(str(exc), where=w) from None
    return out


def _class_indices(classes, value, where) -> list[int]:
    names = [value] if isinstance(value, str) else value
    if not isinstance(names, list) or not names:
        raise SpecError("give a class name or a list of class names", where=where)
    out = []
    for n in names:
        if n not in classes:
            hint = _hint(n, classes)
            raise SpecError(f"unknown class '{n}'" + (f" ({hint})" if hint else ""), where=where)
        out.append(classes.index(n))
    return out


def _classes_region(space, classes, value, where) -> Region:
    idx = _class_indices(classes, value, where)
    return Region.box(space, {CLASS: [(i - 0.5, i + 0.5) for i in idx]})


def _band(space: Space, value: Any, where: str) -> Region:
    if not isinstance(value, dict) or set(value) != {"axis", "at"}:
        raise SpecError("band is {axis: NAME, at: [f0, f1]} with f0 < f1 in normalised units (0..1)", where=where)
    name = value["axis"]
    if name not in space.names or name == CLASS:
        raise SpecError(f"unknown axis '{name}'", where=f"{where}.axis")
    at = value["at"]
    if not (isinstance(at, list) and len(at) == 2 and 0 <= at[0] < at[1] <= 1):
        raise SpecError("at must be [f0, f1] with 0 <= f0 < f1 <= 1", where=f"{where}.at")
    i = space.index[name]
    lo, span = space.t_lo[i], space.t_span[i]
    return Region.box(space, {name: [(lo + at[0] * span, lo + at[1] * span)]})


def _cells(space: Space, value: Any, where: str) -> Region:
    if not isinstance(value, dict) or "grid" not in value:
        raise SpecError("cells is {grid: {axis: bins, ...}, pick: [[i, j], ...] | checkerboard | checkerboard_odd | all}", where=where)
    extra = set(value) - {"grid", "pick"}
    if extra:
        raise SpecError(f"unknown key '{sorted(extra)[0]}'", where=where)
    grid = value["grid"]
    if not isinstance(grid, dict) or not grid:
        raise SpecError("grid maps axis names to numbers of bins", where=f"{where}.grid")
    names = list(grid)
    for n in names:
        if n not in space.names or n == CLASS:
            raise SpecError(f"unknown axis '{n}'", where=f"{where}.grid")
        if not (isinstance(grid[n], int) and not isinstance(grid[n], bool) and grid[n] >= 1):
            raise SpecError("the number of bins must be a positive integer", where=f"{where}.grid.{n}")
    shape = [grid[n] for n in names]
    pick = value.get("pick", "all")
    all_cells = [tuple(int(v) for v in c) for c in np.ndindex(*shape)]
    if pick == "all":
        chosen = all_cells
    elif pick in ("checkerboard", "checkerboard_odd"):
        parity = 0 if pick == "checkerboard" else 1
        chosen = [c for c in all_cells if sum(c) % 2 == parity]
    elif isinstance(pick, list) and pick:
        chosen = []
        for k, c in enumerate(pick):
            c = [c] if isinstance(c, int) else c
            if not (isinstance(c, list) and len(c) == len(shape) and all(isinstance(v, int) and 0 <= v < s for v, s in zip(c, shape))):
                raise SpecError(f"cell {c} is not an index into a grid of {shape}", where=f"{where}.pick.{k}")
            chosen.append(tuple(c))
    else:
        raise SpecError("pick is a list of cell indices, 'checkerboard', 'checkerboard_odd' or 'all'", where=f"{where}.pick")
    return _grid_cells(space, names, shape, chosen)


def _grid_cells(space: Space, names: list, shape: list, chosen: list) -> Region:
    """The region of the chosen cells of a grid. Cells of one grid are disjoint (up to shared
    faces), so their boxes form the region as they are: no pairwise set algebra (a union
    taken cell by cell is quadratic in the number of cells)."""
    boxes = []
    for c in dict.fromkeys(chosen):  # a cell listed twice counts once
        ivs = {}
        for n, k, s in zip(names, c, shape):
            i = space.index[n]
            lo, span = space.t_lo[i], space.t_span[i]
            ivs[n] = [(lo + span * k / s, lo + span * (k + 1) / s)]
        boxes.append(Region.box(space, ivs))
    if not boxes:  # e.g. the odd checkerboard of a single cell
        return Region.empty(space)
    return Region(space, np.vstack([b.lo for b in boxes]), np.vstack([b.hi for b in boxes]))


def _by_class(space, classes, value, where, split_region) -> Region:
    if not isinstance(value, dict) or not value:
        raise SpecError("by_class maps class names (or '*') to regions", where=where)
    out = Region.empty(space)
    named = []
    for name, node in value.items():
        if name == "*":
            continue
        named += _class_indices(classes, name, f"{where}.{name}")
        part = build_region(node, space, classes, f"{where}.{name}", split_region)
        out = out | (part & _classes_region(space, classes, name, f"{where}.{name}"))
    if "*" in value:
        rest = [c for i, c in enumerate(classes) if i not in named]
        if rest:
            part = build_region(value["*"], space, classes, f"{where}.*", split_region)
            out = out | (part & _classes_region(space, classes, rest, f"{where}.*"))
    return out


def t_interval_text(axis: Axis, lo_t: float, hi_t: float) -> str:
    a, b = axis.t_to_interval(lo_t, hi_t)
    if axis.measure == LEVELS:
        lv = [v for i, v in enumerate(axis.levels) if lo_t <= i <= hi_t]
        return "{" + ", ".join(f"{v:g}" for v in lv) + "}"
    return f"[{a:.4g}, {b:.4g}]"
