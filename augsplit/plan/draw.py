"""Per-image parameters: (plan, split, image index) -> class, instance and every axis value.

Image i of a split takes its class from the split's per-class blocks (classes in order,
counts from the plan), its instance round-robin over the class's allowed instances, and its
transform from the first draws of its own stream (see space/streams.py), through exact
sampling of the split's region for that class. Nothing depends on which other images are
drawn, so any subset, in any order, on any worker, gives the same values.
"""

from __future__ import annotations

import numpy as np

from ..space.axes import CLASS, DRAW_DEFAULTS, POSITION_AXES
from ..space.sample import sample_t_each
from ..space.streams import image_uniforms
from .planner import Plan, SplitPlan

DEFAULTS = DRAW_DEFAULTS  # the catalogue's values for axes a spec does not vary
POSITION = POSITION_AXES


def class_of(split: SplitPlan, indices: np.ndarray) -> np.ndarray:
    """Class index of each image index (per-class blocks in class order)."""
    ends = np.cumsum(split.counts)
    idx = np.asarray(indices, dtype=np.int64)
    if idx.size and (idx.min() < 0 or idx.max() >= ends[-1]):
        raise IndexError(f"image index out of range for split '{split.name}' (0..{int(ends[-1]) - 1})")
    return np.searchsorted(ends, idx, side="right")


def params_from_t(plan: Plan, t: np.ndarray) -> dict[str, np.ndarray]:
    """Points in t (N, ndim) -> value columns for every built-in axis, plus positions in px/deg."""
    space, canvas = plan.space, plan.canvas
    n = len(t)
    vals = {name: space[name].from_t(t[:, i]) for i, name in enumerate(space.names) if name != CLASS}
    out: dict[str, np.ndarray] = {}
    for name in POSITION:
        out[name] = vals.get(name, np.full(n, np.nan))
    for name, d in DEFAULTS.items():
        out[name] = vals.get(name, np.full(n, d))
    cx, cy = canvas.centre
    if "eccentricity" in space:
        r = canvas.radius_to_px(space["eccentricity"].unit, out["eccentricity"])
        px, py = canvas.polar_to_px(r, out["polar_angle"])
    else:
        px = canvas.to_px("x", space["x"].unit, out["x"]) if "x" in space else np.full(n, cx)
        py = canvas.to_px("y", space["y"].unit, out["y"]) if "y" in space else np.full(n, cy)
    out["cx_px"], out["cy_px"] = np.asarray(px, float), np.asarray(py, float)
    if canvas.viewing is not None:
        v = canvas.viewing
        out["x_deg"] = v.offset_to_deg(out["cx_px"] - cx)
        out["y_deg"] = v.offset_to_deg(out["cy_px"] - cy)
        out["eccentricity_deg"] = v.offset_to_deg(np.hypot(out["cx_px"] - cx, out["cy_px"] - cy))
    else:
        out["x_deg"] = out["y_deg"] = out["eccentricity_deg"] = np.full(n, np.nan)
    out["mirror"] = np.rint(out["mirror"]).astype(np.int8)
    return out


def draw(plan: Plan, split: SplitPlan | str, indices) -> dict[str, np.ndarray]:
    """Columns for the given image indices of a split (see the module docstring)."""
    split = plan.split(split) if isinstance(split, str) else split
    idx = np.asarray(indices, dtype=np.int64).ravel()
    cls = class_of(split, idx)
    starts = np.concatenate([[0], np.cumsum(split.counts)[:-1]])
    inst = np.empty(len(idx), dtype=np.int32)
    for c in np.unique(cls):
        rows = np.flatnonzero(cls == c)
        ids = np.array(plan.instance_ids(split, int(c)), dtype=np.int32)
        inst[rows] = ids[(idx[rows] - starts[c]) % len(ids)]
    u = image_uniforms(plan.seed, split.index, idx, plan.space.ndim + 1)
    if split.stratify:
        u = _stratified(split, idx, cls, starts, u)
    return _columns(plan, split, idx, cls, inst, u)


def _stratified(split: SplitPlan, idx, cls, starts, u) -> np.ndarray:
    """Image j of a class's block goes to cell j mod (number of cells): the box-picking uniform
    is replaced by the middle of that cell's share of the cumulative mass."""
    u = u.copy()
    for c in np.unique(cls):
        rows = np.flatnonzero(cls == c)
        region = split.class_region(int(c))
        cum = np.concatenate([[0.0], np.cumsum(region.box_masses())])
        cum /= cum[-1]
        k = (idx[rows] - starts[c]) % region.nbox
        u[rows, 0] = (cum[k] + cum[k + 1]) / 2.0
    return u


def draw_online(plan: Plan, split: SplitPlan | str, u: np.ndarray, indices=None) -> dict[str, np.ndarray]:
    """Columns for fresh draws (online augmentation): uniforms u (N, ndim + 3) pick the class
    (in proportion to the split's per-class counts), the instance, then the transform."""
    split, u, cls, inst = _online_pick(plan, split, u)
    idx = np.arange(len(u), dtype=np.int64) if indices is None else np.asarray(indices, dtype=np.int64)
    return _columns(plan, split, idx, cls, inst, u[:, 2:])


def draw_placements(plan: Plan, split: SplitPlan | str, u: np.ndarray) -> dict[str, np.ndarray]:
    """The draws of `draw_online` with only what placing an object needs: class_index,
    class_name, instance and the transform columns (no index, cell or instance_seen), for
    the extra objects of a scene, drawn a few at a time."""
    split, u, cls, inst = _online_pick(plan, split, u)
    out = params_from_t(plan, _sample(split, cls, u[:, 2:]))
    out.update(class_index=cls.astype(np.int32), instance=inst, class_name=_class_names(plan, cls))
    return out


def _online_pick(plan: Plan, split: SplitPlan | str, u: np.ndarray):
    """(split, u as (N, ndim + 3), class, instance) of fresh draws."""
    split = plan.split(split) if isinstance(split, str) else split
    u = np.asarray(u, dtype=float).reshape(-1, plan.space.ndim + 3)
    w = np.cumsum(np.asarray(split.counts, dtype=float))
    cls = np.minimum(np.searchsorted(w / w[-1], u[:, 0], side="right"), len(w) - 1)
    start, count, ids = plan.instance_table(split)
    n = count[cls]
    if not n.all():
        raise ValueError(f"split '{split.name}' allows no instance of class {plan.classes[cls[n == 0][0]]}")
    inst = ids[start[cls] + np.minimum((u[:, 1] * n).astype(np.int64), n - 1)]
    return split, u, cls, inst


def _sample(split: SplitPlan, cls: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Points in t: each row sampled exactly from its class's region."""
    return sample_t_each(split.class_stack(), cls, u)


def _class_names(plan: Plan, cls: np.ndarray) -> np.ndarray:
    return np.array([plan.classes[c] for c in cls], dtype=object)


def _columns(plan, split, idx, cls, inst, u) -> dict[str, np.ndarray]:
    t = _sample(split, cls, u)
    out = params_from_t(plan, t)
    seen = np.array([i in plan.instances[c] for c, i in zip(cls.tolist(), inst.tolist())], dtype=bool)
    out.update(index=idx, class_index=cls.astype(np.int32), instance=inst, instance_seen=seen,
               cell=split.region.box_of_t(t).astype(np.int32))
    out["class_name"] = _class_names(plan, cls)
    return out
