"""Axis definitions: the one place that says which axes exist, their units and measures.

Every axis maps its values to a *measure coordinate* t in which the axis's measure is
uniform (t = v for linear and circular, t = ln v for log, t = level index for levels).
Regions store intervals in t, so mass, sampling and distances are plain arithmetic.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

LINEAR, LOG, CIRCULAR, LEVELS = "linear", "log", "circular", "levels"
MEASURES = (LINEAR, LOG, CIRCULAR, LEVELS)


@dataclass(frozen=True)
class AxisKind:
    """What a built-in axis name means: its default range, measure, units and role."""

    name: str
    role: str  # "position", "polar", "scale", "angle", "colour", "mirror", "class"
    measure: str
    default_range: tuple[float, float] | None
    units: tuple[str, ...]
    doc: str


# The built-in axes. Positions: y grows downward (image rows) in every unit; polar_angle
# is counter-clockwise from rightward as seen on the screen (the visual-field convention).
BUILTIN: dict[str, AxisKind] = {
    k.name: k
    for k in (
        AxisKind("x", "position", LINEAR, None, ("px", "frac", "deg"), "object centre, horizontal"),
        AxisKind("y", "position", LINEAR, None, ("px", "frac", "deg"), "object centre, vertical (down)"),
        AxisKind("eccentricity", "polar", LINEAR, None, ("px", "deg"), "distance of the centre from the canvas centre"),
        AxisKind("polar_angle", "polar", CIRCULAR, (0.0, 360.0), ("deg",), "direction of the centre from the canvas centre"),
        AxisKind("scale", "scale", LINEAR, (1.0, 1.0), ("x",), "multiplier of the object's native size"),
        AxisKind("angle", "angle", CIRCULAR, (0.0, 360.0), ("deg",), "in-plane rotation, counter-clockwise"),
        AxisKind("hue", "colour", CIRCULAR, (0.0, 360.0), ("deg",), "hue rotation of the object's colours"),
        AxisKind("saturation", "colour", LINEAR, (1.0, 1.0), ("x",), "saturation multiplier"),
        AxisKind("brightness", "colour", LINEAR, (1.0, 1.0), ("x",), "value (brightness) multiplier"),
        AxisKind("mirror", "mirror", LEVELS, (0.0, 1.0), ("",), "0 as drawn, 1 mirrored left-right"),
        AxisKind("class", "class", LEVELS, None, ("",), "object class index (internal; regions per class)"),
    )
}


@dataclass(frozen=True)
class Axis:
    """One dimension of transform space: a range, a measure and a unit."""

    name: str
    lo: float
    hi: float
    measure: str = LINEAR
    unit: str = ""
    levels: tuple[float, ...] = field(default=())

    @property
    def circular(self) -> bool:
        return self.measure == CIRCULAR

    @property
    def period(self) -> float:
        return self.hi - self.lo

    @property
    def t_range(self) -> tuple[float, float]:
        """The axis's whole range in measure coordinates."""
        if self.measure == LEVELS:
            return (-0.5, len(self.levels) - 0.5)
        if self.measure == LOG:
            return (math.log(self.lo), math.log(self.hi))
        return (self.lo, self.hi)

    @property
    def t_span(self) -> float:
        lo, hi = self.t_range
        return hi - lo

    def to_t(self, values) -> np.ndarray:
        """Values in the axis unit -> measure coordinate. Values off a levels axis give NaN."""
        v = np.asarray(values, dtype=float)
        if self.measure == LOG:
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.where(v > 0, np.log(np.where(v > 0, v, 1.0)), np.nan)
        if self.measure == CIRCULAR:
            return self.lo + np.mod(v - self.lo, self.period)
        if self.measure == LEVELS:
            return self._level_index(v)
        return v

    def _level_index(self, v: np.ndarray) -> np.ndarray:
        # nearest level by binary search: O(N log L) time and O(N) memory, even for many classes
        lv = np.asarray(self.levels, dtype=float)
        order = np.argsort(lv)
        srt = lv[order]
        pos = np.searchsorted(srt, v)
        left = np.clip(pos - 1, 0, srt.size - 1)
        right = np.clip(pos, 0, srt.size - 1)
        with np.errstate(invalid="ignore"):
            near = np.where(np.abs(v - srt[left]) <= np.abs(v - srt[right]), left, right)
            ok = np.abs(v - srt[near]) <= 1e-9 * np.maximum(1.0, np.abs(srt[near]))
        return np.where(ok, order[near].astype(float), np.nan)

    def from_t(self, t) -> np.ndarray:
        """Measure coordinate -> value in the axis unit (levels: nearest level)."""
        t = np.asarray(t, dtype=float)
        if self.measure == LOG:
            return np.exp(t)
        if self.measure == LEVELS:
            idx = np.clip(np.rint(t), 0, len(self.levels) - 1).astype(int)
            return np.asarray(self.levels, dtype=float)[idx]
        return t

    def interval_to_t(self, a: float, b: float) -> list[tuple[float, float]]:
        """A closed interval [a, b] in axis units -> disjoint t-intervals (wrap splits in two).

        Raises ValueError with a user-readable reason; the spec layer adds the key path.
        """
        if not (math.isfinite(a) and math.isfinite(b)):
            raise ValueError(f"interval [{a:g}, {b:g}] is not finite")
        if self.measure == CIRCULAR:
            if b - a >= self.period - 1e-12:
                return [self.t_range]
            a0 = self.lo + (a - self.lo) % self.period
            b0 = self.lo + (b - self.lo) % self.period
            if a0 == b0 and a != b:
                return [self.t_range]
            if a0 < b0 or (a0 == b0):
                if b0 - a0 <= 0:
                    raise ValueError(f"interval [{a:g}, {b:g}] is empty")
                return [(a0, b0)]
            return [(a0, self.hi), (self.lo, b0)]  # wraps round, e.g. [330, 30]
        if b < a:
            raise ValueError(f"interval [{a:g}, {b:g}] is empty")
        if a < self.lo - 1e-9 * max(1.0, abs(self.lo)) or b > self.hi + 1e-9 * max(1.0, abs(self.hi)):
            raise ValueError(f"interval [{a:g}, {b:g}] lies outside the axis range [{self.lo:g}, {self.hi:g}]")
        if self.measure == LEVELS:
            lv = np.asarray(self.levels, dtype=float)
            inside = np.flatnonzero((lv >= a - 1e-9) & (lv <= b + 1e-9))
            if inside.size == 0:
                raise ValueError(f"interval [{a:g}, {b:g}] holds none of the levels {list(self.levels)}")
            # consecutive runs of level indices become unit cells [i-0.5, j+0.5]
            runs, start = [], inside[0]
            for prev, cur in zip(inside[:-1], inside[1:]):
                if cur != prev + 1:
                    runs.append((start - 0.5, prev + 0.5))
                    start = cur
            runs.append((start - 0.5, inside[-1] + 0.5))
            return [(float(x), float(y)) for x, y in runs]
        if b == a:
            raise ValueError(f"interval [{a:g}, {b:g}] has zero width")
        if self.measure == LOG:
            return [(math.log(a), math.log(b))]
        return [(float(a), float(b))]

    def t_to_interval(self, lo_t: float, hi_t: float) -> tuple[float, float]:
        """A t-interval back in axis units, for display."""
        if self.measure == LEVELS:
            i0 = int(math.ceil(lo_t)); i1 = int(math.floor(hi_t))
            return (self.levels[max(i0, 0)], self.levels[min(i1, len(self.levels) - 1)])
        return (float(self.from_t(lo_t)), float(self.from_t(hi_t)))

    def describe(self) -> str:
        if self.measure == LEVELS:
            return f"{self.name}: levels {list(self.levels)}"
        return f"{self.name}: [{self.lo:g}, {self.hi:g}] {self.unit} ({self.measure})"


class Space:
    """An ordered set of axes: the coordinate system every region of a spec lives in."""

    def __init__(self, axes):
        self.axes: tuple[Axis, ...] = tuple(axes)
        self.names: tuple[str, ...] = tuple(a.name for a in self.axes)
        if len(set(self.names)) != len(self.names):
            raise ValueError(f"duplicate axis names in {self.names}")
        self.index = {n: i for i, n in enumerate(self.names)}
        self.t_lo = np.array([a.t_range[0] for a in self.axes], dtype=float)
        self.t_hi = np.array([a.t_range[1] for a in self.axes], dtype=float)
        self.periodic = np.array([a.circular for a in self.axes], dtype=bool)

    @property
    def ndim(self) -> int:
        return len(self.axes)

    @property
    def t_span(self) -> np.ndarray:
        return self.t_hi - self.t_lo

    def __getitem__(self, name: str) -> Axis:
        return self.axes[self.index[name]]

    def __contains__(self, name: str) -> bool:
        return name in self.index

    def __eq__(self, other) -> bool:
        return isinstance(other, Space) and self.axes == other.axes

    def __hash__(self) -> int:
        return hash(self.axes)

    def __repr__(self) -> str:
        return "Space(" + ", ".join(self.names) + ")"

    def to_t(self, values: dict | np.ndarray) -> np.ndarray:
        """Points as {axis: values} or an (N, ndim) array in axis units -> (N, ndim) in t."""
        if isinstance(values, dict):
            cols = [self.axes[i].to_t(values[n]) for i, n in enumerate(self.names)]
            return np.stack(np.broadcast_arrays(*cols), axis=-1).reshape(-1, self.ndim)
        v = np.asarray(values, dtype=float).reshape(-1, self.ndim)
        return np.stack([a.to_t(v[:, i]) for i, a in enumerate(self.axes)], axis=-1)

    def from_t(self, t: np.ndarray) -> np.ndarray:
        t = np.asarray(t, dtype=float).reshape(-1, self.ndim)
        return np.stack([a.from_t(t[:, i]) for i, a in enumerate(self.axes)], axis=-1)

    def normalise_t(self, t: np.ndarray) -> np.ndarray:
        """t -> [0, 1] per axis (the normalised units margins and audits use)."""
        return (np.asarray(t, dtype=float) - self.t_lo) / self.t_span
