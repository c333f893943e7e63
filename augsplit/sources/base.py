"""The object-source and background interfaces, and the Sprite value every source yields.

A Sprite is an RGBA patch (straight alpha) with its anchor, class and instance; it also
caches the float arrays the renderer warps, so each sprite is converted once per process.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Iterator, Protocol, runtime_checkable

import cv2
import numpy as np

from .. import limits as L
from ..errors import AugsplitError, SourceError

# The alpha level (fraction of 255) above which a pixel belongs to the object: used for the
# anchor, the extents and, by default, the renderer's footprint.
ALPHA_THRESHOLD = 0.5

# ITU-R BT.601 luma weights, the ones cv2.COLOR_RGB2GRAY uses (OpenCV docs, cvtColor).
LUMA_BT601 = (0.299, 0.587, 0.114)


@dataclass(frozen=True, eq=False)
class Sprite:
    """An object patch. Pixel (r, c) covers [c, c+1) x [r, r+1) in patch coordinates."""

    rgba: np.ndarray  # (h, w, 4) uint8, straight alpha, read-only
    anchor: tuple[float, float]  # (x, y): alpha-weighted centroid of pixels with alpha > ALPHA_THRESHOLD
    class_name: str
    class_index: int
    instance: int

    def __post_init__(self):
        rgba = np.array(self.rgba, dtype=np.uint8, order="C", copy=True)
        if rgba.ndim != 3 or rgba.shape[2] != 4 or rgba.shape[0] == 0 or rgba.shape[1] == 0:
            raise ValueError(f"Sprite needs an (h, w, 4) array, got shape {np.shape(self.rgba)}")
        rgba.flags.writeable = False
        object.__setattr__(self, "rgba", rgba)
        object.__setattr__(self, "anchor", (float(self.anchor[0]), float(self.anchor[1])))

    def __getstate__(self):
        # Only the fields travel (to worker processes); the float caches are rebuilt on demand.
        return {k: self.__dict__[k] for k in ("rgba", "anchor", "class_name", "class_index", "instance")}

    def __setstate__(self, state):
        self.__dict__.update(state)
        self.rgba.flags.writeable = False

    @classmethod
    def from_rgba(cls, rgba: np.ndarray, class_name: str, class_index: int, instance: int,
                  where: str | None = None) -> "Sprite":
        """Build a sprite whose anchor is computed from its alpha; SourceError if it has none."""
        rgba = np.asarray(rgba)
        if rgba.ndim != 3 or rgba.shape[2] != 4 or rgba.shape[0] == 0 or rgba.shape[1] == 0:
            raise SourceError(f"image has shape {rgba.shape}, not (height, width, 4)", where=where)
        anchor = alpha_anchor(rgba[..., 3])
        if anchor is None:
            raise SourceError(
                f"sprite is fully transparent (no pixel with alpha above {ALPHA_THRESHOLD:.0%})", where=where)
        return cls(rgba, anchor, class_name, int(class_index), int(instance))

    @property
    def height(self) -> int:
        return self.rgba.shape[0]

    @property
    def width(self) -> int:
        return self.rgba.shape[1]

    @cached_property
    def alpha(self) -> np.ndarray:
        """Alpha as float32 in [0, 1]."""
        return self.rgba[..., 3].astype(np.float32) * np.float32(1 / 255)

    @cached_property
    def rgb(self) -> np.ndarray:
        """Straight colour as float32 RGB in [0, 1]."""
        return self.rgba[..., :3].astype(np.float32) * np.float32(1 / 255)

    @cached_property
    def hsv(self) -> np.ndarray:
        """Colour in OpenCV float HSV, (h, w, 3) float32: H in degrees [0, 360), S, V in [0, 1]."""
        return cv2.cvtColor(self.rgb, cv2.COLOR_RGB2HSV)

    @cached_property
    def premultiply_weights(self) -> np.ndarray:
        """(h, w, 4) float32 (255a, 255a, 255a, a): multiplies (R, G, B, 1) into the premultiplied patch."""
        a = self.alpha
        return cv2.merge([a * np.float32(255)] * 3 + [a])

    @cached_property
    def premultiplied(self) -> np.ndarray:
        """(h, w, 4) float32: RGB x alpha on the 0-255 scale, then alpha in [0, 1]."""
        return premultiply(self.rgb, self.premultiply_weights, grey=False)

    @cached_property
    def premultiplied_grey(self) -> np.ndarray:
        """As `premultiplied`, colour replaced by BT.601 luma in all three channels."""
        return premultiply(self.rgb, self.premultiply_weights, grey=True)

    @cached_property
    def radius(self) -> float:
        """Native extent: farthest corner of any pixel with alpha > ALPHA_THRESHOLD from the anchor."""
        from ..plan.geometry import reach  # the one definition of reach (below the sources' layer)

        return reach(self.rgba[..., 3] > ALPHA_THRESHOLD * 255, self.anchor)

    def __repr__(self) -> str:
        return (f"Sprite({self.class_name!r}, class_index={self.class_index}, instance={self.instance}, "
                f"size={self.width}x{self.height}, anchor=({self.anchor[0]:.2f}, {self.anchor[1]:.2f}))")


def premultiply(rgb: np.ndarray, weights: np.ndarray, grey: bool) -> np.ndarray:
    """Float32 (h, w, 4) premultiplied patch from straight float RGB in [0, 1] and the sprite's
    `premultiply_weights`: colour x alpha on the 0-255 scale, then alpha in [0, 1].

    Grey patches carry BT.601 luma in all three colour channels; the renderer warps four
    channels either way because OpenCV's 4-channel float warp is the exact bilinear path.
    """
    if grey:  # cv2's float RGB2GRAY uses exactly the BT.601 weights
        rgb1 = cv2.cvtColor(cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY), cv2.COLOR_GRAY2RGBA)
    else:
        rgb1 = cv2.cvtColor(rgb, cv2.COLOR_RGB2RGBA)  # float: the added channel is 1.0
    rgb1 *= weights
    return rgb1


def alpha_anchor(alpha_u8: np.ndarray, threshold: float = ALPHA_THRESHOLD) -> tuple[float, float] | None:
    """Alpha-weighted centroid (x, y) of the pixels with alpha > threshold, pixel centres at .5."""
    a = np.where(alpha_u8 > threshold * 255, alpha_u8.astype(np.float64), 0.0)
    total = a.sum()
    if total <= 0:
        return None
    rows, cols = np.indices(a.shape, dtype=np.float64)
    return (float((a * (cols + 0.5)).sum() / total), float((a * (rows + 0.5)).sum() / total))


@runtime_checkable
class ObjectSource(Protocol):
    """Anything that yields sprites by (class_index, instance)."""

    classes: tuple[str, ...]

    def n_instances(self, class_index: int) -> int: ...

    def sprite(self, class_index: int, instance: int) -> Sprite: ...


@runtime_checkable
class Background(Protocol):
    """Anything that draws a uint8 (H, W, C) canvas from a random stream."""

    def draw(self, rng: np.random.Generator, height: int, width: int, channels: int) -> np.ndarray: ...


def iter_sprites(source: ObjectSource) -> Iterator[Sprite]:
    """Every sprite of a source, class by class, instance by instance."""
    for ci in range(len(source.classes)):
        for inst in range(source.n_instances(ci)):
            yield source.sprite(ci, inst)


class SpriteTable:
    """Shared plumbing for sources whose sprites are all built up front: index checks and lookup."""

    classes: tuple[str, ...]
    _sprites: tuple[tuple[Sprite, ...], ...]

    def n_instances(self, class_index: int) -> int:
        return len(self._sprites[self._check_class(class_index)])

    def sprite(self, class_index: int, instance: int) -> Sprite:
        row = self._sprites[self._check_class(class_index)]
        if not 0 <= instance < len(row):
            raise IndexError(f"class {self.classes[class_index]!r} has {len(row)} instance(s), asked for {instance}")
        return row[instance]

    def _check_class(self, class_index: int) -> int:
        if not 0 <= class_index < len(self.classes):
            raise IndexError(f"class index {class_index} out of range for {len(self.classes)} classes")
        return class_index


class PixelBudget:
    """Sizes of the images a source will hold, refused before each is allocated: one image may
    have at most `per_image` pixels, all of them together `total` (names of limits.* constants)."""

    def __init__(self, per_image: str, total: str, error: type[AugsplitError] = SourceError):
        self.per_image, self.total, self.error = per_image, total, error
        self.used = 0

    def take(self, width: int, height: int, where: str) -> None:
        n = int(width) * int(height)
        limit = getattr(L, self.per_image)
        if n > limit:
            raise self.error(f"{width}x{height} = {n:,} px is above the limit of {limit:,} px per image "
                             f"(limits.{self.per_image})", where=where)
        total = getattr(L, self.total)
        if self.used + n > total:
            raise self.error(f"with this image the source holds {self.used + n:,} px, above the limit of "
                             f"{total:,} px for all its images together (limits.{self.total})", where=where)
        self.used += n


def parse_colour(value, where: str) -> tuple[int, int, int]:
    """An 8-bit RGB triple from a grey level (int) or a triple of ints in [0, 255]."""
    from ..errors import SpecError

    vals = (value,) * 3 if np.isscalar(value) else tuple(value)
    if len(vals) != 3 or not all(isinstance(v, (int, np.integer)) and 0 <= v <= 255 for v in vals):
        raise SpecError(f"colour must be an integer 0-255 or an RGB triple of them, got {value!r}", where=where)
    return tuple(int(v) for v in vals)
