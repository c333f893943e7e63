"""Label the rows of an existing table with the split whose region holds them.

The table (CSV, TSV or Parquet, read by augsplit.formats.table) gives parameters by axis
name, or bounding boxes (`bbox_x0, bbox_y0, bbox_x1, bbox_y1` in px, or `bbox_x, bbox_y,
bbox_w, bbox_h`) from which the centre (and, with a reference size, the scale) is derived.
Each row gets the name of the first split whose region holds it, `guard` if it lies in a band
auto_guard removed, `outside` if a value lies outside an axis's range, or `none`; `ambiguous`
counts rows two splits both claim. An axis no split depends on needs no column. Annotated
datasets (COCO, YOLO, VOC, tables of boxes) reach this module through augsplit.formats.placement.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import DatasetError
from .formats.table import PARQUET_SUFFIXES
from .plan import Plan
from .plan.regions import CLASS, OTHER_CLASS

SPLIT_COLUMN = "split"
OUTSIDE = "outside"
NONE, GUARD = "none", "guard"
MIXED, DROPPED, EMPTY = "mixed", "dropped", "empty"  # of images, by their objects (formats.placement)
# what a row or image gets when no split holds it; a split of the spec must not share the name
LABELS = (NONE, OUTSIDE, GUARD, MIXED, DROPPED, EMPTY)


@dataclass(frozen=True)
class Assignment:
    table: pd.DataFrame
    counts: dict
    ambiguous: int
    outside: dict = field(default_factory=dict)  # axis -> rows whose value lies outside its range
    outside_rows: tuple = ()  # positions of the first few such rows


def axis_matters(plan: Plan, name: str) -> bool:
    """Whether some split's region depends on the axis (does not span its whole range)."""
    i = plan.space.index[name]
    return not all(np.all(sp.region.lo[:, i] <= plan.space.t_lo[i] + 1e-12) and
                   np.all(sp.region.hi[:, i] >= plan.space.t_hi[i] - 1e-12) for sp in plan.splits)


def derive_parameters(df: pd.DataFrame, plan: Plan, ref_size: float | None, where: str) -> pd.DataFrame:
    """Columns of axis values in spec units, derived from bboxes where the axis column is absent."""
    out = pd.DataFrame(index=df.index)
    canvas = plan.canvas
    bbox = _bbox(df, where)
    for ax in plan.space.axes:
        n = ax.name
        if n == CLASS:
            continue
        if n in df.columns:
            out[n] = _numbers(df[n], n, where)
            continue
        if not axis_matters(plan, n):
            i = plan.space.index[n]
            out[n] = ax.from_t(np.full(len(df), (plan.space.t_lo[i] + plan.space.t_hi[i]) / 2.0))
            continue
        if bbox is not None and n in ("x", "y"):
            x0, y0, x1, y1 = bbox
            px = (x0 + x1) / 2.0 if n == "x" else (y0 + y1) / 2.0
            out[n] = canvas.from_px(n, ax.unit, px)
            continue
        if bbox is not None and n in ("eccentricity", "polar_angle"):
            x0, y0, x1, y1 = bbox
            dx, dy = (x0 + x1) / 2.0 - canvas.centre[0], (y0 + y1) / 2.0 - canvas.centre[1]
            if n == "eccentricity":
                out[n] = canvas.radius_from_px(ax.unit, np.hypot(dx, dy))
            else:
                out[n] = np.mod(np.degrees(np.arctan2(-dy, dx)), 360.0)
            continue
        if bbox is not None and n == "scale":
            if ref_size is None:
                raise DatasetError("a split depends on scale and the table has no 'scale' column; give a reference "
                                   "size (--ref-size, the objects' native size in px of the spec's canvas) to derive "
                                   "it from the boxes", where=where)
            if isinstance(ref_size, bool) or not isinstance(ref_size, (int, float)) \
                    or not (np.isfinite(ref_size) and ref_size > 0):
                raise DatasetError(f"the reference size must be a positive number of px, got {ref_size!r}",
                                   where="--ref-size / ref_size")
            x0, y0, x1, y1 = bbox
            out[n] = np.sqrt(np.maximum(x1 - x0, 0) * np.maximum(y1 - y0, 0)) / ref_size
            continue
        bbox_names = " (or bbox_x0, bbox_y0, bbox_x1, bbox_y1, or bbox_x, bbox_y, bbox_w, bbox_h)"
        need = f"'{n}'" + (bbox_names if n in ("x", "y", "eccentricity", "polar_angle", "scale") else "")
        raise DatasetError(f"the table has no column {need}; its columns are {', '.join(map(str, df.columns))}", where=where)
    return out


def _numbers(col: pd.Series, name: str, where: str) -> np.ndarray:
    """A column as floats; a value that is not a finite number is an error naming its rows."""
    v = pd.to_numeric(col, errors="coerce").to_numpy(float)
    bad = np.flatnonzero(~np.isfinite(v))
    if bad.size:
        rows = ", ".join(str(r) for r in bad[:5]) + (f" and {bad.size - 5} more" if bad.size > 5 else "")
        raise DatasetError(f"column '{name}' holds values that are not finite numbers (rows {rows}, counting from 0)",
                           where=where)
    return v


def _bbox(df: pd.DataFrame, where: str = "table"):
    if {"bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"} <= set(df.columns):
        return tuple(_numbers(df[c], c, where) for c in ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"))
    if {"bbox_x", "bbox_y", "bbox_w", "bbox_h"} <= set(df.columns):
        x, y, w, h = (_numbers(df[c], c, where) for c in ("bbox_x", "bbox_y", "bbox_w", "bbox_h"))
        return x, y, x + w, y + h
    return None


LABEL_COLUMNS = ("class_name", "class", "label", "category")


def class_column(df: pd.DataFrame, plan: Plan, where: str) -> np.ndarray:
    """Class index per row, matching the labels as written to the spec's class names (needed
    only when some region depends on the class). A label the spec does not name takes the
    '*' class of a spec without objects; with objects it is an error."""
    for col in LABEL_COLUMNS:
        if col in df.columns:
            names = df[col].astype(str)
            known = {n: i for i, n in enumerate(plan.classes) if n != OTHER_CLASS}
            idx = names.map(known)
            if OTHER_CLASS in plan.classes:
                idx = idx.fillna(plan.classes.index(OTHER_CLASS))
            if idx.isna().any():
                bad = names[idx.isna()].unique()[:3]
                raise DatasetError(f"column '{col}' holds classes the spec does not have: {', '.join(bad)} "
                                   f"(the spec's classes: {', '.join(plan.classes[:8])})", where=where)
            return idx.to_numpy(float)
    return None


def depends_on_class(region) -> bool:
    """Whether membership in `region` changes with the class (e.g. a by_class region)."""
    space = region.space
    c = space.index[CLASS]
    n = len(space[CLASS].levels)
    parts = []
    for k in range(n):
        part = region.restrict(CLASS, k - 0.5, k + 0.5)
        lo, hi = part.lo.copy(), part.hi.copy()
        lo[:, c], hi[:, c] = space.t_lo[c], space.t_hi[c]
        parts.append(type(region)(space, lo, hi))
    return any(((p - parts[0]) | (parts[0] - p)).mass() > 1e-12 for p in parts[1:])


def assign(plan: Plan, df: pd.DataFrame, ref_size: float | None = None, where: str = "table") -> Assignment:
    for s in plan.splits:
        if s.name in LABELS:
            raise DatasetError(f"'{s.name}' is the label assign gives what no split holds "
                               f"({', '.join(LABELS)}); rename the split", where=f"splits.{s.name}")
    params = derive_parameters(df, plan, ref_size, where)
    space = plan.space
    class_matters = any(depends_on_class(sp.region) for sp in plan.splits)
    cls = class_column(df, plan, where) if class_matters else None
    if cls is None and class_matters:
        raise DatasetError(f"the spec's regions depend on the class, but the table has no class column "
                           f"({', '.join(LABEL_COLUMNS)})", where=where)
    if cls is None:
        cls = np.zeros(len(df))
    t = np.column_stack([space[n].to_t(params[n].to_numpy(float)) for n in space.names if n != CLASS] + [cls])
    labels = np.full(len(df), NONE, dtype=object)
    off = ~((t >= space.t_lo - 1e-9) & (t <= space.t_hi + 1e-9))  # NaN (e.g. log of 0) counts as outside
    outside = {n: int(off[:, i].sum()) for i, n in enumerate(space.names) if n != CLASS and off[:, i].any()}
    labels[off.any(axis=1)] = OUTSIDE
    claimed = np.zeros(len(df), dtype=int)
    for s in plan.splits:
        inside = s.region.contains_t(t)
        claimed += inside
        labels[(labels == NONE) & inside] = s.name
    if plan.guard is not None:
        labels[(labels == NONE) & plan.guard.contains_t(t)] = GUARD
    out = df.copy()
    out[SPLIT_COLUMN] = labels
    counts = pd.Series(labels).value_counts().to_dict()
    return Assignment(out, {k: int(v) for k, v in counts.items()}, int((claimed > 1).sum()), outside,
                      tuple(int(i) for i in np.flatnonzero(off.any(axis=1))[:5]))


def default_output(table: str | Path) -> Path:
    """`<table>.assigned.<ext>` beside the input: Parquet for a Parquet file or folder, TSV
    for a TSV, CSV otherwise."""
    p = Path(table).absolute()  # '.' has no name of its own
    suffix = p.suffix.lower()
    if p.is_dir() or suffix in PARQUET_SUFFIXES:
        ext = suffix if suffix in PARQUET_SUFFIXES else ".parquet"
    else:
        ext = suffix if suffix in (".tsv", ".tab") else ".csv"
    return p.with_name(f"{p.stem}.assigned{ext}")
