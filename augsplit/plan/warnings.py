"""Plan-time warnings: what a valid spec cannot do although it seems to say so.

Each is a frozen value with a code, the split, axes and classes involved, the numbers and one
line of text. The planner attaches them to the plan (`Plan.warnings`); `plan`, `plan --json`
and `generate` show them, and `--strict` turns them into errors. Codes:

  off_canvas         a split's region can put an object partly or wholly off the canvas
  colour_no_effect   a colour axis changes no pixel of any object the splits use
  axis_constant      an axis takes one value in every split (it varies nowhere)
  class_unused       a class of the object source is in no split
  class_empty        a split asks for a class its region holds none of
  range_ignored      an axis gives levels and also a range or dist, which levels override
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..space.axes import LEVELS
from ..space.region import Region
from .kinds import projection
from .regions import CLASS
from .visibility import least_visible

COLOUR_AXES = ("hue", "saturation", "brightness")


@dataclass(frozen=True)
class PlanWarning:
    code: str
    message: str
    split: str | None = None
    axes: tuple[str, ...] = ()
    classes: tuple[str, ...] = ()
    numbers: dict = field(default_factory=dict, compare=False)

    def as_dict(self) -> dict:
        return {"code": self.code, "split": self.split, "axes": list(self.axes), "classes": list(self.classes),
                "numbers": self.numbers, "message": self.message}

    def __str__(self) -> str:
        return f"[{self.code}] {self.message}"


def plan_warnings(plan, source) -> tuple[PlanWarning, ...]:
    """Every warning for a finished plan (`source` is the plan's object source)."""
    out: list[PlanWarning] = []
    out += _class_warnings(plan)
    out += _range_warnings(plan)
    out += _axis_warnings(plan)
    if source is not None:  # a spec that only splits existing data has no sprites to look at
        out += _colour_warnings(plan, source)
        out += _canvas_warnings(plan, source)
    return tuple(out)


def _range_warnings(plan) -> list[PlanWarning]:
    """Axes whose levels override a range or dist given beside them (an error would refuse the
    datasets already made from such specs; a warning, an error under --strict, tells new ones)."""
    out = []
    for name, a in (plan.spec.axes or {}).items():
        if a is not None and a.levels is not None and (a.range is not None or a.dist != "uniform"):
            given = " and ".join(w for w, v in (("range", a.range is not None), ("dist", a.dist != "uniform")) if v)
            out.append(PlanWarning("range_ignored", f"axis {name} gives levels and a {given}; the levels alone set "
                                   f"its values and the {given} is ignored: remove it", None, (name,)))
    return out


# ---- classes ----------------------------------------------------------------------------------


def _class_warnings(plan) -> list[PlanWarning]:
    out = []
    for s in plan.splits:
        asked = asked_classes(plan.spec, s.name, plan.classes)
        empty = [c for c in (range(len(plan.classes)) if asked is None else sorted(asked))
                 if s.class_region(c).mass() <= 1e-12]
        if empty:
            names = tuple(plan.classes[c] for c in empty)
            out.append(PlanWarning(
                "class_empty",
                f"split {s.name} asks for images of class {', '.join(names)} but its region holds none of "
                f"{'it' if len(names) == 1 else 'them'} (mass 0), so it makes none; check the class's region "
                f"(e.g. a by_class entry or a referenced split without that class)",
                s.name, (), names, {"mass": 0.0}))
    unused = tuple(c for i, c in enumerate(plan.classes) if not any(s.counts[i] for s in plan.splits))
    if unused:
        out.append(PlanWarning(
            "class_unused",
            f"class {', '.join(unused)} of the object source {'is' if len(unused) == 1 else 'are'} in no split "
            f"({len(plan.classes) - len(unused)} of {len(plan.classes)} classes are used); give "
            f"{'it' if len(unused) == 1 else 'them'} a region (e.g. in by_class) or use another object source",
            None, (), unused, {"classes_used": len(plan.classes) - len(unused), "classes": len(plan.classes)}))
    return out


def asked_classes(spec, name: str, classes: tuple[str, ...], visiting: tuple[str, ...] = ()) -> set[int] | None:
    """The class indices a split asks for (None: every class): its `classes:` list, or else the
    classes its region names (`class:`, `by_class` keys, referenced splits; not `minus`)."""
    if name not in spec.splits or name in visiting:
        return None
    s = spec.splits[name]
    if s.classes is not None:
        return {classes.index(c) for c in s.classes if c in classes}
    return _node_classes(s.region, spec, classes, visiting + (name,))


def _names(value, classes) -> set[int]:
    names = [value] if isinstance(value, str) else list(value or [])
    return {classes.index(n) for n in names if n in classes}


def _node_classes(node, spec, classes, visiting) -> set[int] | None:
    if not isinstance(node, dict):
        return None
    out = None  # every class
    for key, value in node.items():
        if key == CLASS:
            term = _names(value, classes)
        elif key == "by_class" and isinstance(value, dict):
            term = None if "*" in value else _names([k for k in value], classes)
        elif key in ("any_of", "all_of") and isinstance(value, list):
            parts = [_node_classes(v, spec, classes, visiting) for v in value]
            if key == "any_of":
                term = None if any(p is None for p in parts) else set().union(*parts)
            else:
                known = [p for p in parts if p is not None]
                term = set.intersection(*known) if known else None
        elif key == "split":
            term = asked_classes(spec, str(value), classes, visiting)
        else:
            continue  # axes, bands, cells and minus do not choose classes
        if term is not None:
            out = term if out is None else out & term
    return out


# ---- axes -------------------------------------------------------------------------------------


def _union(plan) -> Region:
    u = Region.empty(plan.space)
    for s in plan.splits:
        u = u | s.region
    return u


def _axis_warnings(plan) -> list[PlanWarning]:
    out = []
    union = _union(plan)
    for i, ax in enumerate(plan.space.axes):
        if ax.name == CLASS:
            continue
        ivs = projection(union, i)
        if ax.measure == LEVELS:
            values = [v for k, v in enumerate(ax.levels) if any(a - 1e-9 <= k <= b + 1e-9 for a, b in ivs)]
        else:
            width = sum(b - a for a, b in ivs)
            values = [float(ax.from_t(ivs[0][0]))] if width <= 1e-12 and ivs else None
        if values is not None and len(values) <= 1:
            v = values[0] if values else float("nan")
            out.append(PlanWarning(
                "axis_constant",
                f"axis {ax.name} takes the single value {v:g} in every split, so it varies nowhere (it only "
                f"fixes that value); give it more levels or a range to vary it",
                None, (ax.name,), (), {"value": v}))
    return out


def _used_sprites(plan, source) -> dict[int, list]:
    """Class index -> the sprites some split may draw."""
    out: dict[int, dict] = {}
    for s in plan.splits:
        for c, n in enumerate(s.counts):
            if n:
                for i in plan.instance_ids(s, c):
                    out.setdefault(c, {})[i] = source.sprite(c, i)
    return {c: list(d.values()) for c, d in out.items()}


def colour_reach(sprites) -> dict[str, float]:
    """Over the opaque pixels (alpha > 0) of the sprites: the largest channel spread
    (max - min of R, G, B; 0 means grey, so hue cannot act), and the range of HSV
    saturation and value (0-1) among coloured resp. non-black pixels."""
    spread, s_lo, s_hi, v_lo, v_hi = 0, 1.0, 0.0, 1.0, 0.0
    for sp in sprites:
        px = sp.rgba[sp.rgba[..., 3] > 0][:, :3].astype(np.int64)
        if not len(px):
            continue
        mx, mn = px.max(axis=1), px.min(axis=1)
        spread = max(spread, int((mx - mn).max()))
        col = mx > mn
        if col.any():
            sat = (mx[col] - mn[col]) / mx[col]
            s_lo, s_hi = min(s_lo, float(sat.min())), max(s_hi, float(sat.max()))
        lit = mx > 0
        if lit.any():
            val = mx[lit] / 255.0
            v_lo, v_hi = min(v_lo, float(val.min())), max(v_hi, float(val.max()))
    return {"max_channel_spread": spread, "saturation_min": s_lo, "saturation_max": s_hi,
            "value_min": v_lo, "value_max": v_hi}


def _multiplier_acts(lo: float, hi: float, plane_lo: float, plane_hi: float) -> bool:
    """Whether x -> min(m x, 1) changes some x in [plane_lo, plane_hi] (x > 0) for some m in
    [lo, hi]: any m < 1 lowers every x > 0; m > 1 raises the x below 1."""
    if plane_hi <= 0 or plane_lo > plane_hi:
        return False
    return lo < 1.0 or (hi > 1.0 and plane_lo < 1.0)


def _colour_warnings(plan, source) -> list[PlanWarning]:
    axes = [ax for ax in plan.space.axes if ax.name in COLOUR_AXES]
    if not axes:
        return []
    sprites = [sp for group in _used_sprites(plan, source).values() for sp in group]
    reach = colour_reach(sprites)
    union = _union(plan)
    out = []
    for ax in axes:
        ivs = projection(union, plan.space.index[ax.name])
        if not ivs:
            continue
        lo, hi = float(ax.from_t(ivs[0][0])), float(ax.from_t(ivs[-1][1]))
        if ax.name == "hue":
            acts, why = reach["max_channel_spread"] > 0, "every opaque pixel of every object is grey (R = G = B)"
        elif ax.name == "saturation":
            acts = reach["max_channel_spread"] > 0 and _multiplier_acts(lo, hi, reach["saturation_min"], reach["saturation_max"])
            why = ("every opaque pixel of every object is grey (R = G = B)" if reach["max_channel_spread"] == 0 else
                   f"every coloured pixel is already fully saturated and the range [{lo:g}, {hi:g}] only raises saturation")
        else:
            acts = _multiplier_acts(lo, hi, reach["value_min"], reach["value_max"])
            why = ("every opaque pixel of every object is black" if reach["value_max"] <= 0 else
                   f"every opaque pixel is already at full value and the range [{lo:g}, {hi:g}] only raises it")
        if not acts:
            out.append(PlanWarning(
                "colour_no_effect",
                f"axis {ax.name} changes no pixel of the objects: {why}; give the objects a colour "
                f"(objects.colour) or drop the axis",
                None, (ax.name,), (), dict(reach, sprites_checked=len(sprites))))
    return out


# ---- the canvas -------------------------------------------------------------------------------


def _pct(f: float) -> str:
    """A share that never rounds to 0% or 100% when it is neither."""
    if 0 < f < 0.01 or 0.99 < f < 1:
        return f"{math.floor(f * 1000) / 10:.1f}%"
    return f"{f:.0%}"


def _placement(plan, w) -> dict:
    """The worst placement in the spec's axis units (and px)."""
    space, canvas = plan.space, plan.canvas
    out = {"cx_px": w.cx, "cy_px": w.cy}
    if "eccentricity" in space:
        ccx, ccy = canvas.centre
        r = math.hypot(w.cx - ccx, w.cy - ccy)
        out["eccentricity"] = float(canvas.radius_from_px(space["eccentricity"].unit, r))
        out["polar_angle"] = math.degrees(math.atan2(-(w.cy - ccy), w.cx - ccx)) % 360.0
    for name, px in (("x", w.cx), ("y", w.cy)):
        if name in space:
            out[name] = float(canvas.from_px(name, space[name].unit, px))
    out.update(scale=w.scale, angle=w.angle, mirror=w.mirror)
    return out


def _canvas_warnings(plan, source) -> list[PlanWarning]:
    out = []
    thr = plan.spec.render.alpha_threshold
    space = plan.space
    for s in plan.splits:
        sprites = {c: [source.sprite(c, i) for i in plan.instance_ids(s, c)] for c, n in enumerate(s.counts) if n}
        w = least_visible(space, plan.canvas, s.region, sprites, thr)
        if w is None:
            continue
        axes = _off_canvas_axes(space, w)
        where = _placement(plan, w)
        shown = ", ".join(f"{k} {v:.4g}" if isinstance(v, float) else f"{k} {v}"
                          for k, v in where.items() if k in space.names or k in ("eccentricity", "polar_angle"))
        cls = plan.classes[w.cls]
        how = "wholly" if w.fraction <= 0 else "partly"
        cause = (f"the range of {' and '.join(axes)} reaches past the {'/'.join(w.edges)} edge" if axes
                 else f"the object is larger than the canvas reaches ({'/'.join(w.edges)} edge)")
        out.append(PlanWarning(
            "off_canvas",
            f"split {s.name} can put objects {how} off the canvas: as little as {_pct(w.fraction)} of class {cls} "
            f"(instance {w.instance}) stays visible, at {shown or 'the canvas centre'}; {cause}; narrow the "
            f"range, enlarge the canvas or set render.keep_inside: true",
            s.name, tuple(axes), (cls,),
            {"least_visible_fraction": w.fraction, "class": cls, "instance": w.instance, "edges": list(w.edges),
             "placement": where}))
    return out


def _off_canvas_axes(space, w) -> list[str]:
    """The axes whose range lets the least visible placement `w` cross the canvas edges."""
    axes = []
    if "eccentricity" in space:
        axes.append("eccentricity")
    else:
        if "x" in space and {"left", "right"} & set(w.edges):
            axes.append("x")
        if "y" in space and {"top", "bottom"} & set(w.edges):
            axes.append("y")
    if "scale" in space and (w.smaller_scale_helps or not axes):
        axes.append("scale")
    return axes
