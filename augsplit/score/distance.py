"""Distance from the training images, per axis: the axes score measures (the one list of them),
nearest-neighbour distances on each kind of axis (plane, visual angle, octaves, circle), the
spacing of the training images, and wrapping circular values into their axis range.

The reference is every training image, or, where the protocol is per class, the training
images of the query image's own class (`same_class=True`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from ..space.axes import BUILTIN, POSITION_AXES

PERIOD = 360.0
SAME_CLASS = "same class"
ANY_CLASS = "any class"


def of_class(reference: str) -> str:
    """'the same class' or 'any class', as read after 'the nearest training image of'."""
    return "the same class" if reference == SAME_CLASS else reference


@dataclass(frozen=True)
class DistanceAxis:
    """How far a held-out image is from the training region along one kind of transform."""

    name: str
    unit: str
    columns: tuple[str, ...]
    kind: str  # "euclidean" (px), "visual_angle" (deg), "octaves" (log2 ratio), "circular" (deg)
    doc: str


@dataclass(frozen=True)
class ValueAxis:
    column: str
    kind: str  # "linear", "log", "circular"


# positions are scored through the rendered centre (px, deg); every other catalogue axis by itself
_OWN_AXES = tuple(k for k in BUILTIN.values() if k.column and k.name not in POSITION_AXES)


def _own_distance(k) -> DistanceAxis:
    """A catalogue axis's distance: octaves for scale, the short way round for circular axes,
    the plain difference otherwise."""
    if k.distance == "octaves":
        return DistanceAxis(f"{k.name}_octaves", "oct", (k.name,), "octaves", f"|log2({k.name} / nearest training {k.name})|")
    if k.distance == "circular":
        return DistanceAxis(f"{k.name}_deg", "deg", (k.name,), "circular",
                            f"{k.name} difference to the nearest training {k.name}, the short way round")
    return DistanceAxis(k.name, k.units[0], (k.name,), "euclidean", f"{k.name} difference to the nearest training {k.name}")


# the axes score measures, derived from the axis catalogue (space/axes.py); the one place
# they are listed in this package
DISTANCE_AXES: tuple[DistanceAxis, ...] = (
    DistanceAxis("position_px", "px", ("cx_px", "cy_px"), "euclidean",
                 "distance of the object centre to the nearest training centre"),
    DistanceAxis("position_deg", "deg", ("x_deg", "y_deg"), "visual_angle",
                 "the angle at the eye between the two centres' lines of sight (needs viewing geometry)"),
    *(_own_distance(k) for k in _OWN_AXES),
)
VALUE_AXES: tuple[ValueAxis, ...] = (
    ValueAxis("cx_px", "linear"), ValueAxis("cy_px", "linear"),
    ValueAxis("x_deg", "linear"), ValueAxis("y_deg", "linear"),
    ValueAxis("eccentricity_deg", "linear"), ValueAxis("polar_angle", "circular"),
    *(ValueAxis(k.name, {"octaves": "log", "circular": "circular"}.get(k.distance, "linear")) for k in _OWN_AXES),
)

def wrap(v, lo: float = 0.0, period: float = PERIOD) -> np.ndarray:
    """Circular values moved by whole periods into [lo, lo + period)."""
    w = lo + np.mod(np.asarray(v, dtype=float) - lo, period)
    return np.where(w >= lo + period, lo, w)  # np.mod(-1e-20, 360) is 360.0


def sight_lines(xy_deg: np.ndarray) -> np.ndarray:
    """Unit vectors from the eye to screen points given as (atan(dx / D), atan(dy / D)) in deg.

    The point sits at (tan x, tan y, 1) * D; the chord between two unit vectors grows with
    the angle between them (chord = 2 sin(angle / 2)), so the nearest chord is the nearest angle.
    """
    t = np.tan(np.radians(xy_deg))
    v = np.column_stack([t[:, 0], t[:, 1], np.ones(len(t))])
    return v / np.linalg.norm(v, axis=1, keepdims=True)


def chord_to_deg(chord) -> np.ndarray:
    return np.degrees(2.0 * np.arcsin(np.clip(np.asarray(chord, dtype=float) / 2.0, 0.0, 1.0)))


def _points(values: np.ndarray, kind: str):
    """The values as points of a KD-tree in which Euclidean distance orders as the axis's own
    distance, and the tree's periodic box size (None: not periodic)."""
    if kind == "octaves":
        return np.log2(values), None
    if kind == "circular":
        return wrap(values), PERIOD
    if kind == "visual_angle":
        return sight_lines(values), None
    return values, None


def _as_axis(d, kind: str) -> np.ndarray:
    d = np.asarray(d, dtype=float)
    return chord_to_deg(d) if kind == "visual_angle" else d


def nearest_distance(train: np.ndarray, query: np.ndarray, kind: str) -> np.ndarray:
    """Distance from each query row to the nearest training row on one axis kind.

    euclidean: plain distance over the columns; octaves: |log2 ratio|; circular: degrees the
    short way round (a KD-tree on the circle via periodic boxes); visual_angle: columns are the
    horizontal and vertical visual angles atan(offset / D) of points on a flat screen, and the
    distance is the exact angle at the eye between two of them (see `sight_lines`).
    """
    train = np.asarray(train, dtype=float).reshape(len(train), -1)
    query = np.asarray(query, dtype=float).reshape(len(query), -1)
    if len(query) == 0:
        return np.zeros(0)
    pts, box = _points(train, kind)
    d, _ = cKDTree(pts, boxsize=box).query(_points(query, kind)[0], k=1)
    return _as_axis(d, kind)


def nearest_other(train: np.ndarray, kind: str) -> np.ndarray:
    """Each training row's distance to its nearest other training row (empty below two rows)."""
    train = np.asarray(train, dtype=float).reshape(len(train), -1)
    if len(train) < 2:
        return np.zeros(0)
    pts, box = _points(train, kind)
    d, _ = cKDTree(pts, boxsize=box).query(pts, k=2)
    return _as_axis(d[:, 1], kind)


def train_spacing(train: np.ndarray, kind: str, classes=None) -> float:
    """How far apart training images lie on an axis: 95th percentile of each one's distance to
    its nearest other training image (of its own class, when `classes` are given). A held-out
    split whose median distance exceeds it lies beyond the training region on that axis
    (common practice, no source)."""
    train = np.asarray(train, dtype=float).reshape(len(train), -1)
    if classes is None:
        gaps = nearest_other(train, kind)
    else:
        classes = np.asarray(classes)
        gaps = np.concatenate([nearest_other(train[classes == c], kind) for c in np.unique(classes)] or [[]])
    return float(np.quantile(gaps, 0.95)) if gaps.size else 0.0


def reference_distance(train: pd.DataFrame, query: pd.DataFrame, axis: DistanceAxis,
                       same_class: bool) -> np.ndarray:
    """Each query row's distance to the nearest training row on one axis: to any training row,
    or to the nearest of its own class (NaN where its class has no training row)."""
    cols = list(axis.columns)
    q = query[cols].to_numpy(dtype=float)
    if not same_class:
        return nearest_distance(train[cols].to_numpy(dtype=float), q, axis.kind)
    out = np.full(len(query), np.nan)
    qc = query["class_index"].to_numpy()
    tc = train["class_index"].to_numpy()
    for c in np.unique(qc):
        tr = train[cols].to_numpy(dtype=float)[tc == c]
        if len(tr):
            out[qc == c] = nearest_distance(tr, q[qc == c], axis.kind)
    return out


def varied_axes(manifest: pd.DataFrame) -> list[DistanceAxis]:
    """The distance axes whose columns the manifest has, finite and not all constant."""
    used = []
    for ax in DISTANCE_AXES:
        if not all(c in manifest.columns for c in ax.columns):
            continue
        allv = manifest[list(ax.columns)].to_numpy(dtype=float)
        if np.isfinite(allv).all() and not np.all(np.ptp(allv, axis=0) == 0):
            used.append(ax)
    return used


def add_distance_columns(manifest: pd.DataFrame, rows: pd.DataFrame, train_split: str,
                         same_class: bool = False) -> list[DistanceAxis]:
    """Fill rows['dist_<axis>'] for every axis the dataset varies; return those axes."""
    train = manifest[manifest["split"] == train_split]
    is_train = (rows["split"] == train_split).to_numpy()
    axes = varied_axes(manifest)
    for ax in axes:
        d = reference_distance(train, rows, ax, same_class)
        d[is_train] = 0.0
        rows[f"dist_{ax.name}"] = d
    return axes


def arc_start(v: np.ndarray) -> float:
    """Start of the shortest arc holding every angle: just after the widest empty gap."""
    s = np.sort(wrap(v))
    gaps = np.diff(np.concatenate([s, [s[0] + PERIOD]]))
    i = int(np.argmax(gaps))
    return float(s[(i + 1) % s.size]) if gaps[i] > 0 else 0.0
