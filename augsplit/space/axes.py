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


# What an axis does to the pixels: moves or reshapes the object, recolours it, picks it, or
# nothing the renderer sees directly (the polar pair is turned into a position first).
GEOMETRY, COLOUR, PICK = "geometry", "colour", "class"
PIXEL_EFFECTS = (GEOMETRY, COLOUR, PICK)
# How a distance is measured along an axis: plain difference, log2 ratio (octaves), the short
# way round a circle, or whether two levels differ.
DISTANCES = (LINEAR, "octaves", CIRCULAR, LEVELS)

CLASS = "class"  # the internal axis that gives regions per class (by_class)


@dataclass(frozen=True)
class AxisKind:
    """One built-in axis: its meaning, measure, units, manifest column and dtype, the value an
    image takes when a spec does not vary it, what it does to pixels and how distance on it is
    measured. THE catalogue: manifest columns, draw defaults, render parameters, the albu
    transforms, score, audit and the parameter log all derive their axis lists from BUILTIN."""

    name: str
    role: str  # "position", "polar", "scale", "angle", "colour", "mirror", "class"
    measure: str
    default_range: tuple[float, float] | None
    units: tuple[str, ...]
    doc: str
    column: str | None = None  # manifest column (None: not stored as such, e.g. class)
    dtype: str = "float64"  # the manifest column's Arrow type name
    default: float | None = None  # value when a spec does not vary the axis (None: NaN / derived)
    pixels: str = GEOMETRY  # GEOMETRY, COLOUR or PICK
    distance: str = LINEAR  # one of DISTANCES
    render_param: str | None = None  # the renderer's parameter this axis ends up as (None: via cx/cy)

    def __post_init__(self):
        if self.pixels not in PIXEL_EFFECTS or self.distance not in DISTANCES:
            raise ValueError(f"axis {self.name}: pixels {self.pixels!r} / distance {self.distance!r} unknown")


def _k(name, role, measure, default_range, units, doc, *, dtype="float64", default=None, pixels=GEOMETRY,
       distance=None, render=None, column=True):
    return AxisKind(name, role, measure, default_range, units, doc, name if column else None, dtype, default,
                    pixels, distance or measure, render)


# The built-in axes. Positions: y grows downward (image rows) in every unit; polar_angle
# is counter-clockwise from rightward as seen on the screen (the visual-field convention).
# Positions reach the renderer as the pixel centre (cx_px, cy_px), the others by name.
BUILTIN: dict[str, AxisKind] = {
    k.name: k
    for k in (
        _k("x", "position", LINEAR, None, ("px", "frac", "deg"), "object centre, horizontal (NaN for polar specs: see cx_px)"),
        _k("y", "position", LINEAR, None, ("px", "frac", "deg"), "object centre, vertical (down)"),
        _k("eccentricity", "polar", LINEAR, None, ("px", "deg"), "distance of the centre from the canvas centre (NaN for x/y specs)"),
        _k("polar_angle", "polar", CIRCULAR, (0.0, 360.0), ("deg",), "direction of the centre from the canvas centre"),
        _k("scale", "scale", LINEAR, (1.0, 1.0), ("x",), "multiplier of the object's native size",
           default=1.0, distance="octaves", render="scale"),
        _k("angle", "angle", CIRCULAR, (0.0, 360.0), ("deg",), "in-plane rotation, counter-clockwise",
           default=0.0, render="angle"),
        _k("hue", "colour", CIRCULAR, (0.0, 360.0), ("deg",), "hue rotation of the object's colours",
           default=0.0, pixels=COLOUR, render="hue"),
        _k("saturation", "colour", LINEAR, (1.0, 1.0), ("x",), "saturation multiplier",
           default=1.0, pixels=COLOUR, render="saturation"),
        _k("brightness", "colour", LINEAR, (1.0, 1.0), ("x",), "value (brightness) multiplier",
           default=1.0, pixels=COLOUR, render="brightness"),
        _k("mirror", "mirror", LEVELS, (0.0, 1.0), ("",), "0 as drawn, 1 mirrored left-right",
           dtype="int8", default=0.0, render="mirror"),
        _k(CLASS, "class", LEVELS, None, ("",), "object class index (internal; regions per class)",
           dtype="int32", pixels=PICK, column=False),
    )
}

# Derived lists (in catalogue order): every consumer takes its axis names from these.
AXIS_COLUMNS: tuple[str, ...] = tuple(k.column for k in BUILTIN.values() if k.column)
DRAW_DEFAULTS: dict[str, float] = {k.name: k.default for k in BUILTIN.values() if k.default is not None}
POSITION_AXES: tuple[str, ...] = tuple(k.name for k in BUILTIN.values() if k.role in ("position", "polar"))
GEOMETRY_AXES: tuple[str, ...] = tuple(k.name for k in BUILTIN.values() if k.pixels == GEOMETRY)
COLOUR_AXES: tuple[str, ...] = tuple(k.name for k in BUILTIN.values() if k.pixels == COLOUR)
# the renderer's parameters: the pixel centre, then the axes that reach it by name (geometry first)
RENDER_PARAMS: tuple[str, ...] = ("cx_px", "cy_px") + tuple(
    k.render_param for eff in (GEOMETRY, COLOUR) for k in BUILTIN.values() if k.render_param and k.pixels == eff)
ANGLE_AXES: tuple[str, ...] = tuple(k.name for k in BUILTIN.values() if "deg" in k.units and k.measure == CIRCULAR)


@dataclass(frozen=True)
class Axis:
    """One dimension of transform space: a range, a measure and a unit."""

    name: str
    lo: float
    hi: float
    measure: str = LINEAR
    unit: str = ""
    levels: tuple[float, ...] = field(default=())

    def __post_init__(self):
        # a bad axis would otherwise surface later as NaN masses or a math domain error
        if self.measure not in MEASURES:
            raise ValueError(f"axis {self.name}: unknown measure {self.measure!r}, expected one of {MEASURES}")
        object.__setattr__(self, "levels", tuple(self.levels))  # a list would make the axis unhashable
        if self.measure == LEVELS:
            lv = np.asarray(self.levels, dtype=float)
            if lv.size == 0 or not np.all(np.isfinite(lv)) or np.unique(lv).size != lv.size:
                raise ValueError(f"axis {self.name}: levels must be distinct finite numbers, got {list(self.levels)}")
            return
        if not (math.isfinite(self.lo) and math.isfinite(self.hi) and self.lo < self.hi):
            raise ValueError(f"axis {self.name}: range [{self.lo:g}, {self.hi:g}] is not a finite interval with lo < hi")
        if self.measure == LOG and self.lo <= 0:
            raise ValueError(f"axis {self.name}: a log axis needs a range above zero, got [{self.lo:g}, {self.hi:g}]")

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

    def wrap(self, values) -> np.ndarray:
        """Circular values -> [lo, hi); other axes unchanged."""
        v = np.asarray(values, dtype=float)
        if not self.circular:
            return v
        w = self.lo + np.mod(v - self.lo, self.period)
        return np.where(w >= self.hi, self.lo, w)  # fmod rounding can land exactly on hi

    def to_t(self, values) -> np.ndarray:
        """Values in the axis unit -> measure coordinate. Values off a levels axis give NaN."""
        v = np.asarray(values, dtype=float)
        if self.measure == LOG:
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.where(v > 0, np.log(np.where(v > 0, v, 1.0)), np.nan)
        if self.measure == LEVELS:
            return self._level_index(v)
        return self.wrap(v)

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
        """Measure coordinate -> value in the axis unit (levels: nearest level; NaN stays NaN)."""
        t = np.asarray(t, dtype=float)
        if self.measure == LOG:
            return np.exp(t)
        if self.measure == LEVELS:
            finite = np.isfinite(t)
            idx = np.clip(np.rint(np.where(finite, t, 0.0)), 0, len(self.levels) - 1).astype(int)
            return np.where(finite, np.asarray(self.levels, dtype=float)[idx], np.nan)
        return t

    def interval_to_t(self, a: float, b: float) -> list[tuple[float, float]]:
        """A closed interval [a, b] in axis units -> disjoint t-intervals (wrap splits in two).

        On a circular axis [a, b] runs counter-clockwise from a to b, so [330, 30] and
        [-30, 30] are the same 60-degree interval and b - a >= period is the whole circle.
        Raises ValueError with a user-readable reason; the spec layer adds the key path.
        """
        a, b = float(a), float(b)
        if not (math.isfinite(a) and math.isfinite(b)):
            raise ValueError(f"interval [{a:g}, {b:g}] is not finite")
        if self.measure == CIRCULAR:
            return self._circular_to_t(a, b)
        if b < a:
            raise ValueError(f"interval [{a:g}, {b:g}] is empty (the end is below the start)")
        tol = 1e-9 * max(1.0, abs(self.lo), abs(self.hi))
        if a < self.lo - tol or b > self.hi + tol:
            raise ValueError(f"interval [{a:g}, {b:g}] lies outside the axis range [{self.lo:g}, {self.hi:g}]")
        if self.measure == LEVELS:
            return self._level_runs(a, b)
        if b == a:
            raise ValueError(f"interval [{a:g}, {b:g}] has zero width")
        if self.measure == LOG:
            return [(math.log(max(a, self.lo)), math.log(min(b, self.hi)))]
        return [(max(a, self.lo), min(b, self.hi))]

    def _circular_to_t(self, a: float, b: float) -> list[tuple[float, float]]:
        lo, hi = float(self.lo), float(self.hi)
        period = hi - lo
        tol = 1e-9 * period  # written bounds like [0.3, 360.3] differ from a turn by rounding only
        if b - a >= period - tol:
            return [(lo, hi)]
        arc = (b - a) % period
        if arc <= tol or arc >= period - tol:  # b - a is 0 or a negative multiple of the period
            raise ValueError(f"interval [{a:g}, {b:g}] has zero width (write [{lo:g}, {hi:g}] for the whole circle)")
        a0, b0 = float(self.wrap(a)), float(self.wrap(b))
        if a0 < b0:
            return [(a0, b0)]
        if b0 <= lo + tol:  # ends on the seam: one piece, not a zero-width second one
            return [(a0, hi)]
        return [(a0, hi), (lo, b0)]  # wraps round, e.g. [330, 30]

    def _level_runs(self, a: float, b: float) -> list[tuple[float, float]]:
        lv = np.asarray(self.levels, dtype=float)
        tol = 1e-9 * max(1.0, abs(a), abs(b))
        inside = np.flatnonzero((lv >= a - tol) & (lv <= b + tol))
        if inside.size == 0:
            raise ValueError(f"interval [{a:g}, {b:g}] holds none of the levels {list(self.levels)}")
        # runs of consecutive level indices become unions of unit cells [i - 0.5, j + 0.5]
        breaks = np.flatnonzero(np.diff(inside) != 1)
        starts = inside[np.r_[0, breaks + 1]]
        ends = inside[np.r_[breaks, inside.size - 1]]
        return [(float(i) - 0.5, float(j) + 0.5) for i, j in zip(starts, ends)]

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
        self.discrete = np.array([a.measure == LEVELS for a in self.axes], dtype=bool)

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

    def as_points(self, values) -> np.ndarray:
        """An (N, ndim) float array of points; one point may be given as shape (ndim,).

        Refuses other shapes rather than reshaping them, which would silently mix coordinates.
        """
        v = np.asarray(values, dtype=float)
        if v.ndim == 1 and (v.size == self.ndim or self.ndim == 1):
            return v.reshape(-1, self.ndim)
        if v.ndim != 2 or v.shape[1] != self.ndim:
            raise ValueError(f"expected points of shape (N, {self.ndim}) for axes {self.names}, got shape {v.shape}")
        return v

    def to_t(self, values: dict | np.ndarray) -> np.ndarray:
        """Points as {axis: values} or an (N, ndim) array in axis units -> (N, ndim) in t."""
        if isinstance(values, dict):
            missing = [n for n in self.names if n not in values]
            if missing:
                raise ValueError(f"points lack values for axes {missing}")
            cols = [a.to_t(values[a.name]) for a in self.axes]
            return np.stack(np.broadcast_arrays(*cols), axis=-1).reshape(-1, self.ndim)
        v = self.as_points(values)
        return np.stack([a.to_t(v[:, i]) for i, a in enumerate(self.axes)], axis=-1)

    def from_t(self, t: np.ndarray) -> np.ndarray:
        t = self.as_points(t)
        return np.stack([a.from_t(t[:, i]) for i, a in enumerate(self.axes)], axis=-1)

    def normalise_t(self, t: np.ndarray) -> np.ndarray:
        """t -> [0, 1] per axis (the normalised units margins and audits use)."""
        return (np.asarray(t, dtype=float) - self.t_lo) / self.t_span
