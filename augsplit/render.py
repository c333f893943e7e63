"""The renderer: a sprite placed on a canvas by a similarity transform, recoloured, composited.

Pure (no I/O, no global state). Per object it makes one cv2.warpAffine of the premultiplied
patch into the object's own bounding box and composites that box only ("over", Porter & Duff
1984); the footprint (warped alpha above a threshold) comes from the same warp.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import cv2
import numpy as np

from .sources.base import ALPHA_THRESHOLD, Sprite, premultiply

_EMPTY_MASK = np.zeros((0, 0), dtype=bool)
_EMPTY_MASK.flags.writeable = False


@dataclass(frozen=True)
class RenderParams:
    """Where and how one object is drawn. Positions are continuous canvas coordinates: pixel
    (r, c) covers [c, c+1) x [r, r+1), so pixel centres sit at .5; y grows downward."""

    cx: float
    cy: float
    scale: float = 1.0
    angle: float = 0.0  # degrees, counter-clockwise as seen on screen
    mirror: bool = False  # left-right about the anchor, before rotation
    hue: float = 0.0  # degrees of hue rotation
    saturation: float = 1.0  # multiplier of HSV saturation (result clipped to 1)
    brightness: float = 1.0  # multiplier of HSV value (result clipped to 1)

    def __post_init__(self):
        if not (self.scale > 0 and math.isfinite(self.scale)):
            raise ValueError(f"scale must be positive and finite, got {self.scale}")
        if not (self.saturation >= 0 and self.brightness >= 0):
            raise ValueError(f"saturation and brightness must be >= 0, got {self.saturation}, {self.brightness}")
        if not all(map(math.isfinite, (self.cx, self.cy, self.angle, self.hue, self.saturation, self.brightness))):
            raise ValueError(f"render parameters must be finite: {self}")

    @property
    def recolours(self) -> bool:
        return self.hue % 360.0 != 0.0 or self.saturation != 1.0 or self.brightness != 1.0


@dataclass(frozen=True, eq=False)
class Placed:
    """What one object left on the canvas."""

    bbox: tuple[int, int, int, int]  # x0, y0, x1, y1 (exclusive) of the visible footprint; zeros if none
    mask: np.ndarray = field(repr=False)  # bool (y1 - y0, x1 - x0): the footprint inside bbox
    footprint_px: int  # pixels of the footprint on the canvas
    visible_fraction: float  # footprint on the canvas / footprint on an unbounded canvas

    @property
    def visible(self) -> bool:
        return self.footprint_px > 0


def _coefficients(anchor: tuple[float, float], p: RenderParams) -> tuple[float, float, float, float, float, float]:
    ax, ay = anchor
    t = math.radians(p.angle)
    a, b = p.scale * math.cos(t), p.scale * math.sin(t)
    m = -1.0 if p.mirror else 1.0
    # cv2.getRotationMatrix2D's [[a, b], [-b, a]] (counter-clockwise on screen, y down) after x -> -x
    l00, l01, l10, l11 = m * a, b, -m * b, a
    return l00, l01, l10, l11, p.cx - l00 * ax - l01 * ay, p.cy - l10 * ax - l11 * ay


def similarity_matrix(anchor: tuple[float, float], p: RenderParams) -> np.ndarray:
    """2x3 affine, continuous patch coordinates -> continuous canvas coordinates: mirror about
    the anchor, then rotate and scale about it (as cv2.getRotationMatrix2D), then move the
    anchor to (cx, cy)."""
    l00, l01, l10, l11, t0, t1 = _coefficients(anchor, p)
    return np.array([[l00, l01, t0], [l10, l11, t1]])


def _warp_box(sprite: Sprite, p: RenderParams):
    """Index-space warp matrix and the integer canvas box (x0, y0, x1, y1) that holds every
    pixel the bilinear warp can make non-zero (the patch grown by half a pixel each side)."""
    l00, l01, l10, l11, t0, t1 = _coefficients(sprite.anchor, p)
    h, w = sprite.rgba.shape[:2]
    # Corners of [-0.5, w + 0.5] x [-0.5, h + 0.5]: beyond it bilinear samples only the zero border.
    xs = (-0.5 * l00 - 0.5 * l01, (w + 0.5) * l00 - 0.5 * l01, -0.5 * l00 + (h + 0.5) * l01,
          (w + 0.5) * l00 + (h + 0.5) * l01)
    ys = (-0.5 * l10 - 0.5 * l11, (w + 0.5) * l10 - 0.5 * l11, -0.5 * l10 + (h + 0.5) * l11,
          (w + 0.5) * l10 + (h + 0.5) * l11)
    x0, x1 = math.floor(min(xs) + t0), math.ceil(max(xs) + t0)
    y0, y1 = math.floor(min(ys) + t1), math.ceil(max(ys) + t1)
    # Pixel centres at .5 in both spaces: index = continuous - 0.5. Then shift into the box.
    mi = np.array((l00, l01, t0 + 0.5 * (l00 + l01) - 0.5 - x0,
                   l10, l11, t1 + 0.5 * (l10 + l11) - 0.5 - y0)).reshape(2, 3)  # flat: a third faster than nested
    return mi, (x0, y0, x1, y1)


def _warp(patch: np.ndarray, mi: np.ndarray, box) -> np.ndarray:
    x0, y0, x1, y1 = box
    # Four float32 channels: in OpenCV 5 this is the unquantised bilinear path (2-channel float
    # warps still snap to 1/32 px there); footprint() and place() warp the same layout so their
    # alpha agrees exactly. A zero border is transparent.
    return cv2.warpAffine(patch, mi, (x1 - x0, y1 - y0), flags=cv2.INTER_LINEAR,
                          borderMode=cv2.BORDER_CONSTANT, borderValue=(0, 0, 0, 0))


def _measure(alpha: np.ndarray, box, canvas_hw, threshold: float):
    """Footprint of a warped alpha box: (clip window into the box, Placed)."""
    x0, y0, x1, y1 = box
    height, width = canvas_hw
    full = alpha > threshold
    total = int(np.count_nonzero(full))
    cx0, cy0, cx1, cy1 = max(x0, 0), max(y0, 0), min(x1, width), min(y1, height)
    if cx0 == x0 and cy0 == y0 and cx1 == x1 and cy1 == y1:
        mask, visible = full, total
    else:
        mask = full[cy0 - y0:cy1 - y0, cx0 - x0:cx1 - x0]
        visible = int(np.count_nonzero(mask))
    window = (cx0, cy0, cx1, cy1)
    if visible == 0:
        return window, Placed((0, 0, 0, 0), _EMPTY_MASK, 0, 0.0)
    bx, by, bw, bh = cv2.boundingRect(mask.view(np.uint8))
    placed = Placed((cx0 + bx, cy0 + by, cx0 + bx + bw, cy0 + by + bh), mask[by:by + bh, bx:bx + bw],
                    visible, visible / total)
    return window, placed


def _off_canvas(box, canvas_hw) -> bool:
    x0, y0, x1, y1 = box
    return x1 <= 0 or y1 <= 0 or x0 >= canvas_hw[1] or y0 >= canvas_hw[0]


def footprint(sprite: Sprite, p: RenderParams, canvas_hw: tuple[int, int],
              alpha_threshold: float = ALPHA_THRESHOLD) -> Placed:
    """The footprint `place` would produce on a canvas of (height, width), without compositing."""
    mi, box = _warp_box(sprite, p)
    if _off_canvas(box, canvas_hw):
        return Placed((0, 0, 0, 0), _EMPTY_MASK, 0, 0.0)
    warped = _warp(sprite.premultiplied, mi, box)
    return _measure(warped[..., 3], box, canvas_hw, alpha_threshold)[1]


def recoloured(sprite: Sprite, p: RenderParams, grey: bool) -> np.ndarray:
    """The sprite's premultiplied patch after the colour axes: hue rotated, saturation and value
    multiplied (clipped to 1) in OpenCV float HSV, before warping. Grey: BT.601 luma after."""
    if not p.recolours:
        return sprite.premultiplied_grey if grey else sprite.premultiplied
    if grey:
        rgb = recolour_hsv(sprite.hsv, p.hue, p.saturation, p.brightness)
        return premultiply(rgb, sprite.premultiply_weights, grey)
    # premultiply's colour case with its RGB2RGBA folded into the HSV conversion: cv2 computes
    # the same RGB either way and writes the fourth channel as 1.0, as RGB2RGBA does (OpenCV's
    # HSV2RGB_f, from memory; the pinned byte tests hold it on the machine that runs them)
    rgba = recolour_hsv(sprite.hsv, p.hue, p.saturation, p.brightness, channels=4)
    rgba *= sprite.premultiply_weights
    return rgba


def recolour_hsv(hsv: np.ndarray, hue: float, saturation: float, brightness: float, channels: int = 3) -> np.ndarray:
    """The colour axes on float32 HSV (OpenCV's: H in degrees, S and V in [0, 1]; (h, w, 3)):
    hue rotated, saturation and value multiplied (clipped to 1); returned as float32 RGB, or
    with `channels` 4 as RGB and a fourth channel of 1.0."""
    shift = np.float32(hue % 360.0)  # cv2's float HSV2RGB wraps H in [360, 720) itself
    if saturation == 1.0 and brightness == 1.0:
        # a hue turn alone: one cv2.add, H + shift in float32 as numpy adds it (the scalar is a
        # float32 value, so cv2's conversion of it is exact); S and V gain +0.0. Measured
        # 0.8-0.9x the time of splitting the planes, adding and merging them again
        if shift:
            hsv = cv2.add(hsv, (float(shift), 0.0, 0.0, 0.0))
        return cv2.cvtColor(hsv, cv2.COLOR_HSV2RGB, dstCn=channels)
    h, s, v = cv2.split(hsv)
    if shift:
        h = h + shift
    if saturation != 1.0:
        s = np.minimum(s * np.float32(saturation), np.float32(1.0))
    if brightness != 1.0:
        v = np.minimum(v * np.float32(brightness), np.float32(1.0))
    return cv2.cvtColor(cv2.merge((h, s, v)), cv2.COLOR_HSV2RGB, dstCn=channels)


def place(canvas: np.ndarray, sprite: Sprite, p: RenderParams, alpha_threshold: float = ALPHA_THRESHOLD) -> Placed:
    """Composite `sprite` onto `canvas` (H, W, C uint8, C = 1 or 3; modified in place) with the
    "over" operator on premultiplied colour: out = src + dst * (1 - alpha_src)."""
    if canvas.ndim != 3 or canvas.shape[2] not in (1, 3) or canvas.dtype != np.uint8:
        raise ValueError(f"canvas must be uint8 (H, W, 1 or 3), got {canvas.dtype} {canvas.shape}")
    return _place(canvas, sprite, p, alpha_threshold)


def _place(canvas: np.ndarray, sprite: Sprite, p: RenderParams, alpha_threshold: float) -> Placed:
    hw = canvas.shape[:2]
    mi, box = _warp_box(sprite, p)
    if _off_canvas(box, hw):
        return Placed((0, 0, 0, 0), _EMPTY_MASK, 0, 0.0)
    channels = canvas.shape[2]
    warped = _warp(recoloured(sprite, p, grey=channels == 1), mi, box)
    (cx0, cy0, cx1, cy1), placed = _measure(warped[..., 3], box, hw, alpha_threshold)
    x0, y0 = box[0], box[1]
    src = warped[cy0 - y0:cy1 - y0, cx0 - x0:cx1 - x0]
    region = canvas[cy0:cy1, cx0:cx1]
    if not src.size:
        return placed
    inv = np.subtract(1.0, src[..., 3], dtype=np.float32)  # 1 - alpha
    if channels == 3:
        # whole (h, w, 3) operands, exact copies: numpy then runs along rows rather than 3 values
        # at a time, as it does for a broadcast (h, w, 1) or a strided 3-of-4-channel view
        inv, colour = cv2.cvtColor(inv, cv2.COLOR_GRAY2RGB), cv2.cvtColor(src, cv2.COLOR_RGBA2RGB)
    else:
        inv, colour = inv[..., None], src[..., :1]
    out = np.multiply(region, inv, dtype=np.float32)  # = region.astype(float32) * (1 - alpha)
    out += colour
    out += 0.5  # round half up; out <= 255 + rounding error, so the cast cannot wrap
    np.copyto(region, out, casting="unsafe")  # the cast astype(np.uint8) makes, in place
    return placed


def render(background: np.ndarray, placements: Sequence[tuple[Sprite, RenderParams]],
           alpha_threshold: float = ALPHA_THRESHOLD) -> tuple[np.ndarray, list[Placed]]:
    """A copy of `background` with each object placed in order (the first is the target; later
    ones are drawn over earlier ones)."""
    canvas = np.array(background, dtype=np.uint8, copy=True, order="C")
    if canvas.ndim == 2:
        canvas = canvas[..., None]
    if canvas.ndim != 3 or canvas.shape[2] not in (1, 3):
        raise ValueError(f"background must be (H, W), (H, W, 1) or (H, W, 3), got {canvas.shape}")
    return canvas, [_place(canvas, s, p, alpha_threshold) for s, p in placements]


def masks_overlap(a: Placed, b: Placed) -> bool:
    """Whether two footprints share a canvas pixel (for scenes whose objects must not overlap)."""
    x0, y0 = max(a.bbox[0], b.bbox[0]), max(a.bbox[1], b.bbox[1])
    x1, y1 = min(a.bbox[2], b.bbox[2]), min(a.bbox[3], b.bbox[3])
    if x0 >= x1 or y0 >= y1:
        return False
    ma = a.mask[y0 - a.bbox[1]:y1 - a.bbox[1], x0 - a.bbox[0]:x1 - a.bbox[0]]
    mb = b.mask[y0 - b.bbox[1]:y1 - b.bbox[1], x0 - b.bbox[0]:x1 - b.bbox[0]]
    return bool(np.any(ma & mb))


def add_footprint(counts: np.ndarray, placed: Placed) -> None:
    """Add one to every canvas pixel of the footprint in `counts` (H, W), e.g. for coverage maps."""
    x0, y0, x1, y1 = placed.bbox
    if placed.footprint_px:
        counts[y0:y1, x0:x1] += placed.mask
