"""Units of position and size: px, frac of the canvas, and degrees of visual angle.

Conventions: `px` and `frac` are absolute canvas coordinates (x from the left edge, y from
the top, continuous, pixel centres at .5); `deg` is visual angle from the canvas centre,
x to the right and y downward. A position offset of s px at viewing distance D px subtends
atan(s / D); an object of size s px centred on the line of sight subtends 2*atan(s / 2D)
(exact formulas, not the small-angle approximation).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Viewing:
    """Viewing geometry: eye-to-screen distance and pixel density."""

    distance_cm: float
    px_per_cm: float

    @property
    def distance_px(self) -> float:
        return self.distance_cm * self.px_per_cm

    def offset_to_deg(self, offset_px):
        """Visual angle (deg) of a point offset_px from the line of sight."""
        return np.degrees(np.arctan(np.asarray(offset_px, dtype=float) / self.distance_px))

    def deg_to_offset(self, deg):
        """Offset (px) from the line of sight of a point at `deg` of visual angle."""
        d = np.asarray(deg, dtype=float)
        if np.any(np.abs(d) >= 90):
            raise ValueError("visual angles of 90 degrees or more have no position on a flat screen")
        return self.distance_px * np.tan(np.radians(d))

    def size_to_deg(self, size_px):
        """Visual angle (deg) subtended by an extent of size_px centred on the line of sight."""
        return np.degrees(2.0 * np.arctan(np.asarray(size_px, dtype=float) / (2.0 * self.distance_px)))

    def deg_to_size(self, deg):
        return 2.0 * self.distance_px * np.tan(np.radians(np.asarray(deg, dtype=float)) / 2.0)


@dataclass(frozen=True)
class Canvas:
    width: int
    height: int
    viewing: Viewing | None = None

    @property
    def centre(self) -> tuple[float, float]:
        return self.width / 2.0, self.height / 2.0

    def _extent(self, axis: str) -> float:
        return self.width if axis == "x" else self.height

    def to_px(self, axis: str, unit: str, values):
        """Coordinate along `axis` ('x' or 'y') in `unit` -> absolute canvas px."""
        v = np.asarray(values, dtype=float)
        if unit == "px":
            return v
        if unit == "frac":
            return v * self._extent(axis)
        if unit == "deg":
            return self._extent(axis) / 2.0 + self._need_viewing().deg_to_offset(v)
        raise ValueError(f"unknown position unit {unit!r}")

    def from_px(self, axis: str, unit: str, px):
        p = np.asarray(px, dtype=float)
        if unit == "px":
            return p
        if unit == "frac":
            return p / self._extent(axis)
        if unit == "deg":
            return self._need_viewing().offset_to_deg(p - self._extent(axis) / 2.0)
        raise ValueError(f"unknown position unit {unit!r}")

    def radius_to_px(self, unit: str, values):
        """Eccentricity in `unit` ('px' or 'deg') -> radius in px from the canvas centre."""
        v = np.asarray(values, dtype=float)
        if unit == "px":
            return v
        if unit == "deg":
            return self._need_viewing().deg_to_offset(v)
        raise ValueError(f"unknown eccentricity unit {unit!r}")

    def radius_from_px(self, unit: str, r_px):
        r = np.asarray(r_px, dtype=float)
        if unit == "px":
            return r
        if unit == "deg":
            return self._need_viewing().offset_to_deg(r)
        raise ValueError(f"unknown eccentricity unit {unit!r}")

    def polar_to_px(self, radius_px, polar_angle_deg):
        """(radius px, polar angle deg counter-clockwise from right) -> absolute (x, y) px; y down."""
        a = np.radians(np.asarray(polar_angle_deg, dtype=float))
        r = np.asarray(radius_px, dtype=float)
        cx, cy = self.centre
        return cx + r * np.cos(a), cy - r * np.sin(a)

    def _need_viewing(self) -> Viewing:
        if self.viewing is None:
            raise ValueError("unit 'deg' needs viewing geometry (viewing: {distance_cm, px_per_cm})")
        return self.viewing

    def half_field_deg(self, axis: str) -> float:
        """Visual angle from the centre to the canvas edge along `axis`."""
        return float(self._need_viewing().offset_to_deg(self._extent(axis) / 2.0))


def deg_per_cm_at(distance_cm: float) -> float:
    """Visual angle of 1 cm centred at `distance_cm` (used to sanity-check geometry)."""
    return math.degrees(2.0 * math.atan(0.5 / distance_cm))
