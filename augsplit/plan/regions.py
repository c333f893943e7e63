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
import re
from typing import Any, Callable

from ..errors import SpecError
from ..limits import MAX_AXIS_VALUE, MAX_REGION_BOXES
from ..space import builders as rb
from ..space.axes import BUILTIN, CIRCULAR, CLASS, LEVELS, LINEAR, LOG, Axis, Space
from ..space.builders import OTHER_CLASS
from ..space.region import Region
from ..spec import Spec, _hint
from ..units import Canvas



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
    _check_unit(name, kind, unit, spec, where)
    if a is not None and a.levels is not None:  # a range or dist beside them is ignored (plan warning range_ignored)
        return _levels_axis(name, a.levels, unit, where)
    rng = a.range if a is not None and a.range is not None else _default_range(kind, unit, canvas, where)
    lo, hi = _checked_range(name, rng, unit, where)
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


_ANGLE_AXES = ("x", "y", "eccentricity")  # the axes a visual-angle unit applies to


def _check_unit(name: str, kind, unit: str, spec: Spec, where: str) -> None:
    if unit not in kind.units:
        raise SpecError(f"unit '{unit}' is not one of {', '.join(repr(u) for u in kind.units)}", where=f"{where}.unit")
    if unit == "deg" and name in _ANGLE_AXES and spec.viewing is None:
        raise SpecError("unit 'deg' needs viewing geometry", where=f"{where}.unit",
                        hint="add viewing: {distance_cm: 57, px_per_cm: 38}")


def _levels_axis(name: str, levels, unit: str, where: str) -> Axis:
    lv = sorted(set(float(v) for v in levels))
    if not lv:
        raise SpecError("levels must not be empty", where=f"{where}.levels")
    _check_magnitude(lv, f"{where}.levels")
    if name == "mirror" and not set(lv) <= {0.0, 1.0}:
        raise SpecError("mirror levels are 0 and/or 1", where=f"{where}.levels")
    if name == "scale" and lv[0] <= 0:
        raise SpecError("scale must be positive", where=f"{where}.levels")
    return Axis(name, lv[0], lv[-1], LEVELS, unit, tuple(lv))


def _checked_range(name: str, rng, unit: str, where: str) -> tuple[float, float]:
    lo, hi = float(rng[0]), float(rng[1])
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        raise SpecError(f"range [{lo:g}, {hi:g}] is empty", where=f"{where}.range")
    _check_magnitude([lo, hi], f"{where}.range")
    if name == "scale" and lo <= 0:
        raise SpecError(f"scale must be positive, got range [{lo:g}, {hi:g}]", where=f"{where}.range")
    if name in ("saturation", "brightness", "eccentricity") and lo < 0:
        raise SpecError(f"{name} cannot be negative, got range [{lo:g}, {hi:g}]", where=f"{where}.range")
    if unit == "deg" and name in _ANGLE_AXES and max(abs(lo), abs(hi)) >= 90:
        raise SpecError("visual angles must lie within (-90, 90) degrees", where=f"{where}.range")
    return lo, hi


def _check_magnitude(values, where: str) -> None:
    big = [v for v in values if not abs(v) <= MAX_AXIS_VALUE]
    if big:
        raise SpecError(f"{big[0]:g} is beyond the largest axis value, {MAX_AXIS_VALUE:g} in magnitude "
                        "(limits.MAX_AXIS_VALUE)", where=where)


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
    parts = [(f"{where}.{key}", _term(key, value, space, classes, f"{where}.{key}", split_region))
             for key, value in node.items() if key != "minus"]  # (key path, region), ANDed in the order written
    out = full
    for sub, part in parts:
        out = part if out is full else _bounded(out & part, sub)
    if "minus" in node:
        out = _bounded(out - build_region(node["minus"], space, classes, f"{where}.minus", split_region), f"{where}.minus")
    return out


def _term(key: str, value, space: Space, classes, sub: str, split_region) -> Region:
    """One key of a region node -> its Region (an axis interval or one of _TERMS)."""
    if key in space.names and key != CLASS:
        _intervals(space[key], value, sub)  # each interval checked where it is written
        return _built(rb.box, sub, space, {key: value})
    handler = _TERMS.get(key)
    if handler is not None:
        return handler(key, value, space, classes, sub, split_region)
    known = [n for n in space.names if n != CLASS] + list(_NODE_KEYS)
    if key in BUILTIN:
        raise SpecError(f"axis '{key}' is not among the spec's axes ({', '.join(n for n in space.names if n != CLASS)})", where=sub,
                        hint="add it under axes: to vary it")
    hint = _hint(key, known)
    raise SpecError(f"unknown region key '{key}'" + (f" ({hint})" if hint else ""), where=sub)


def _combined(key, value, space, classes, sub, split_region) -> Region:
    """any_of / all_of: the union / intersection of a list of nodes."""
    if not isinstance(value, list) or not value:
        raise SpecError(f"{key} takes a non-empty list of regions", where=sub)
    terms = [build_region(v, space, classes, f"{sub}.{i}", split_region) for i, v in enumerate(value)]
    acc = terms[0]
    for t in terms[1:]:
        acc = _bounded((acc | t) if key == "any_of" else (acc & t), sub)
    return acc


def _split_term(key, value, space, classes, sub, split_region) -> Region:
    if split_region is None:
        raise SpecError("'split' cannot be used here", where=sub)
    return split_region(str(value), sub)


# region node key -> handler(key, value, space, classes, where, split_region); `minus` is
# taken away after the other terms, in build_region itself
_TERMS: dict[str, Callable[..., Region]] = {
    CLASS: lambda key, value, space, classes, sub, split_region: _classes_region(space, classes, value, sub),
    "any_of": _combined,
    "all_of": _combined,
    "band": lambda key, value, space, classes, sub, split_region: _band(space, value, sub),
    "cells": lambda key, value, space, classes, sub, split_region: _bounded(_cells(space, value, sub), sub),
    "by_class": lambda key, value, space, classes, sub, split_region: _bounded(
        _by_class(space, classes, value, sub, split_region), sub),
    "split": _split_term,
}


def _bounded(region: Region, where: str) -> Region:
    """Refuse a region of more boxes than MAX_REGION_BOXES: set operations cost the product of
    the operands' box counts, so this keeps every later step of the planner bounded too."""
    if region.nbox > MAX_REGION_BOXES:
        raise SpecError(f"the region has {region.nbox:,} boxes, above the limit of {MAX_REGION_BOXES:,} "
                        f"(limits.MAX_REGION_BOXES)", where=where, hint="use fewer cells or intervals")
    return region


def _intervals(axis: Axis, value: Any, where: str) -> list[tuple[float, float]]:
    """[a, b], [[a, b], ...] or a single level -> t-intervals of the axis."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        value = [value, value] if axis.measure == LEVELS else None
    if (isinstance(value, list) and len(value) == 2 and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
        pairs = [value]
    elif isinstance(value, list) and value and all(isinstance(v, list) for v in value):
        pairs = value
    else:
        raise SpecError("an interval is [low, high] (or a list of them)" + _text_number(value), where=where)
    out = []
    for i, pair in enumerate(pairs):
        w = where if len(pairs) == 1 else f"{where}.{i}"
        if len(pair) != 2 or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in pair):
            raise SpecError("an interval is [low, high] with two numbers" + _text_number(pair), where=w)
        try:
            out += axis.interval_to_t(float(pair[0]), float(pair[1]))
        except ValueError as exc:
            raise SpecError(str(exc), where=w) from None
    return out


def _text_number(value) -> str:
    """Why a value that looks like a number is not one: YAML 1.1 reads an exponent without a
    '.' or a sign (5.6e1, 1e3) as text."""
    items = value if isinstance(value, list) else [value]
    for v in items:
        if isinstance(v, str) and re.fullmatch(r"[-+]?(\d+\.?\d*|\.\d+)[eE][-+]?\d+", v.strip()):
            return (f"; {v!r} is text to YAML, not a number (write an exponent with a '.' and a sign, "
                    f"as 5.6e+1, or the plain number)")
    return ""


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
    _class_indices(classes, value, where)
    return _built(rb.of_classes, where, space, classes, value)


def _built(fn, where: str, *args, **kw) -> Region:
    """Call a Python region builder; its ValueError becomes a SpecError at `where`."""
    try:
        return fn(*args, **kw)
    except ValueError as exc:
        raise SpecError(str(exc), where=where) from None


def _band(space: Space, value: Any, where: str) -> Region:
    if not isinstance(value, dict) or set(value) != {"axis", "at"}:
        raise SpecError("band is {axis: NAME, at: [f0, f1]} with f0 < f1 in normalised units (0..1)", where=where)
    name = value["axis"]
    if name not in space.names or name == CLASS:
        raise SpecError(f"unknown axis '{name}'", where=f"{where}.axis")
    return _built(rb.band, f"{where}.at", space, name, value["at"])


def _cells(space: Space, value: Any, where: str) -> Region:
    if not isinstance(value, dict) or "grid" not in value:
        raise SpecError("cells is {grid: {axis: bins, ...}, pick: [[i, j], ...] | checkerboard | checkerboard_odd | all}", where=where)
    extra = set(value) - {"grid", "pick"}
    if extra:
        raise SpecError(f"unknown key '{sorted(extra)[0]}'", where=where)
    grid = value["grid"]
    if not isinstance(grid, dict) or not grid:
        raise SpecError("grid maps axis names to numbers of bins", where=f"{where}.grid")
    for n in grid:
        if n not in space.names or n == CLASS:
            raise SpecError(f"unknown axis '{n}'", where=f"{where}.grid")
        if not (isinstance(grid[n], int) and not isinstance(grid[n], bool) and grid[n] >= 1):
            raise SpecError("the number of bins must be a positive integer", where=f"{where}.grid.{n}")
    _built(rb.check_grid_size, f"{where}.grid", [grid[n] for n in grid])
    pick = value.get("pick", "all")
    if isinstance(pick, list):
        shape = list(grid.values())
        for k, c in enumerate(pick):
            _built(rb.grid_cells, f"{where}.pick.{k}", shape, [c])
    return _built(rb.cells, f"{where}.pick", space, grid, pick)


def _by_class(space, classes, value, where, split_region) -> Region:
    if not isinstance(value, dict) or not value:
        raise SpecError("by_class maps class names (or '*') to regions", where=where)
    parts = {}
    for name, node in value.items():
        if name != OTHER_CLASS:
            _class_indices(classes, name, f"{where}.{name}")
        parts[name] = build_region(node, space, classes, f"{where}.{name}", split_region)
    return _built(rb.by_class, where, space, classes, parts)


def named_classes(node: Any) -> list[str]:
    """Class names a region node mentions (in `class:` terms and `by_class` keys), in order."""
    out: list[str] = []
    if isinstance(node, dict):
        for key, value in node.items():
            if key == CLASS:
                out += [value] if isinstance(value, str) else [str(v) for v in value or []]
            elif key == "by_class" and isinstance(value, dict):
                out += [str(k) for k in value if k != "*"]
                out += [n for v in value.values() for n in named_classes(v)]
            elif key in ("any_of", "all_of") and isinstance(value, list):
                out += [n for v in value for n in named_classes(v)]
            elif key == "minus":
                out += named_classes(value)
    return list(dict.fromkeys(out))


def t_interval_text(axis: Axis, lo_t: float, hi_t: float) -> str:
    a, b = axis.t_to_interval(lo_t, hi_t)
    if axis.measure == LEVELS:
        lv = [v for i, v in enumerate(axis.levels) if lo_t <= i <= hi_t]
        return "{" + ", ".join(f"{v:g}" for v in lv) + "}"
    return f"[{a:.4g}, {b:.4g}]"
