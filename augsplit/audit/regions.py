"""Declared regions: do two splits' regions intersect, per axis and jointly, and does the data
lie where its split says? Without a spec, the splits' own per-axis ranges stand in."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..space import Region
from .proximity import AxisScale
from .result import FAIL, PASS, WARN, CheckResult, top_rows


def _axis_intervals(region: Region, i: int) -> list[tuple[float, float]]:
    """The region's projection on axis i (t units), as merged intervals."""
    ivs = sorted(zip(region.lo[:, i].tolist(), region.hi[:, i].tolist()))
    out: list[list[float]] = []
    for a, b in ivs:
        if out and a <= out[-1][1]:
            out[-1][1] = max(out[-1][1], b)
        else:
            out.append([a, b])
    return [(a, b) for a, b in out]


def _overlap_length(a: list[tuple[float, float]], b: list[tuple[float, float]]) -> float:
    return float(sum(max(0.0, min(x1, y1) - max(x0, y0)) for x0, x1 in a for y0, y1 in b))


def check_declared_regions(region_a: Region, region_b: Region, points_a: dict | None = None,
                           points_b: dict | None = None, ids_a=None, ids_b=None,
                           pair: tuple[str, str] | None = None, worst_k: int = 20) -> CheckResult:
    """Joint and per-axis intersection of two declared regions; with points (axis -> values of
    each split's rows), also rows outside their own region and rows inside the other's."""
    space = region_a.space
    joint = region_a & region_b
    per_axis = {}
    for i, name in enumerate(space.names):
        ov = _overlap_length(_axis_intervals(region_a, i), _axis_intervals(region_b, i))
        per_axis[name] = {"overlap_fraction_of_axis": ov / float(space.t_span[i]) if space.t_span[i] else 0.0}
    numbers = {"joint_overlap_mass": float(joint.mass()), "mass_a": float(region_a.mass()),
               "mass_b": float(region_b.mass()), "per_axis": per_axis}
    problems, frames = [], []
    if joint.mass() > 0:
        problems.append(f"the declared regions intersect (mass {joint.mass():.3g} of the space)")
    for label, pts, own, other, ids in (("a", points_a, region_a, region_b, ids_a),
                                        ("b", points_b, region_b, region_a, ids_b)):
        if pts is None:
            continue
        n = len(next(iter(pts.values()))) if pts else 0
        inside_own = own.contains(pts)
        inside_other = other.contains(pts) if joint.mass() == 0 else np.zeros(n, bool)
        outside = ~inside_own
        # a row on a face both regions share is still in its own region: not an intruder
        intruder = inside_other & ~inside_own
        numbers[f"n_{label}_outside_own_region"] = int(outside.sum())
        numbers[f"n_{label}_inside_other_region"] = int(intruder.sum())
        split = pair[0 if label == "a" else 1] if pair else label
        if intruder.any():
            problems.append(f"{int(intruder.sum())} {split} rows lie inside the other split's region")
        if (outside & ~intruder).any():
            problems.append(f"{int((outside & ~intruder).sum())} {split} rows lie outside their own region")
        bad = np.flatnonzero(outside | intruder)
        ids = np.arange(n) if ids is None else np.asarray(ids)
        frames.append(pd.DataFrame({"split": split, "row": bad, "id": ids[bad],
                                    "problem": np.where(intruder[bad], "inside other region", "outside own region")}))
    worst = top_rows(pd.concat(frames, ignore_index=True), "row", worst_k, ascending=True) if frames else None
    verdict = FAIL if problems else PASS
    detail = "; ".join(problems) if problems else "declared regions are disjoint and every row lies in its own split's region"
    return CheckResult("declared_regions", verdict, numbers, worst, detail, pair)


def covering_arc(u: np.ndarray) -> tuple[float, float]:
    """Smallest arc (start, length) of the unit circle holding all points u in [0, 1)."""
    s = np.sort(np.asarray(u, float))
    if len(s) == 0:
        return 0.0, 0.0
    gaps = np.diff(np.r_[s, s[0] + 1.0])
    k = int(np.argmax(gaps))
    start = s[(k + 1) % len(s)]
    return float(start), float(1.0 - gaps[k])


def _arc_pieces(start: float, length: float) -> list[tuple[float, float]]:
    end = start + length
    return [(start, end)] if end <= 1.0 else [(start, 1.0), (0.0, end - 1.0)]


def data_ranges(u: np.ndarray, periodic: bool) -> list[tuple[float, float]]:
    """A split's range on one normalised axis: [min, max], or the smallest covering arc."""
    u = np.asarray(u, float)
    u = u[np.isfinite(u)]
    if len(u) == 0:
        return []
    if periodic:
        return _arc_pieces(*covering_arc(u))
    return [(float(u.min()), float(u.max()))]


def check_data_ranges(a: np.ndarray, b: np.ndarray, scales: list[AxisScale],
                      pair: tuple[str, str] | None = None) -> CheckResult:
    """Without declared regions: per-axis overlap of the two splits' own ranges (arcs on
    circular axes). Their bounding boxes intersecting is a warning, not a proof of overlap."""
    per_axis, all_overlap = {}, bool(scales)
    for i, s in enumerate(scales):
        ra = data_ranges(s.normalise(a[:, i]), s.periodic)
        rb = data_ranges(s.normalise(b[:, i]), s.periodic)
        ov = _overlap_length(ra, rb)
        touching = ov > 0 or any(max(x0, y0) <= min(x1, y1) for x0, x1 in ra for y0, y1 in rb)
        per_axis[s.name] = {"range_a": ra, "range_b": rb, "overlap_fraction_of_axis": ov, "overlap": bool(touching)}
        all_overlap &= touching
    numbers = {"per_axis": per_axis, "bounding_boxes_intersect": bool(all_overlap), "source": "data"}
    if all_overlap:
        return CheckResult("declared_regions", WARN, numbers, None,
                           "no disjointness claimed between these splits; their data ranges overlap on every axis", pair)
    sep = [k for k, v in per_axis.items() if not v["overlap"]]
    return CheckResult("declared_regions", PASS, numbers, None,
                       f"no disjointness claimed between these splits; their data ranges are separated on {', '.join(sep)}", pair)
