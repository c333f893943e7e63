"""Text glyphs drawn with OpenCV's built-in fonts (cv2.FONT_HERSHEY_*): each string a class,
each font an instance, antialiased ink as alpha.

OpenCV 4 draws these as Hershey vector strokes; OpenCV 5 maps the same codes onto its
built-in TrueType faces, where some codes render identically, so instances are checked for
distinctness (an unseen instance equal to a seen one would leak between splits).
"""

from __future__ import annotations

from typing import Sequence

import cv2
import numpy as np

from ..errors import SpecError
from ..limits import MAX_CLASSES, MAX_SPRITE_SIDE
from .base import PixelBudget, Sprite, SpriteTable, parse_colour

FONTS = {
    "simplex": cv2.FONT_HERSHEY_SIMPLEX,
    "plain": cv2.FONT_HERSHEY_PLAIN,
    "duplex": cv2.FONT_HERSHEY_DUPLEX,
    "complex": cv2.FONT_HERSHEY_COMPLEX,
    "triplex": cv2.FONT_HERSHEY_TRIPLEX,
    "complex_small": cv2.FONT_HERSHEY_COMPLEX_SMALL,
    "script_simplex": cv2.FONT_HERSHEY_SCRIPT_SIMPLEX,
    "script_complex": cv2.FONT_HERSHEY_SCRIPT_COMPLEX,
}
ITALIC_SUFFIX = "_italic"  # e.g. "complex_italic" adds cv2.FONT_ITALIC


def font_code(name: str) -> int:
    base = name[: -len(ITALIC_SUFFIX)] if name.endswith(ITALIC_SUFFIX) else name
    if base not in FONTS:
        raise SpecError(f"unknown font {name!r}; choose from {', '.join(FONTS)} (optionally + '{ITALIC_SUFFIX}')",
                        where="objects.fonts")
    return FONTS[base] | (cv2.FONT_ITALIC if base != name else 0)


DEFAULT_FONTS = ("simplex", "duplex", "script_simplex", "script_complex")  # distinct in OpenCV 4 and 5.0 (5.1: see pyproject)


def _ink(text: str, font: int, scale: float, thickness: int, budget: PixelBudget | None = None,
         where: str = "objects.texts") -> np.ndarray:
    (w, h), baseline = cv2.getTextSize(text, font, scale, thickness)
    pad = thickness + 4 + h // 2  # italics and script fonts overhang the reported box
    if budget is not None:  # refuse before allocating
        budget.take(w + 2 * pad, h + baseline + 2 * pad, where)
    ink = np.zeros((h + baseline + 2 * pad, w + 2 * pad), dtype=np.uint8)
    cv2.putText(ink, text, (pad, pad + h), font, scale, 255, thickness, cv2.LINE_AA)
    x, y, bw, bh = cv2.boundingRect(ink)
    return ink[y:y + bh, x:x + bw]


def draw_text(text: str, font: int, height_px: int, thickness: int, budget: PixelBudget | None = None,
              where: str = "objects.texts") -> np.ndarray:
    """Antialiased coverage (uint8, 0-255) of `text`, cropped to its ink, scaled so that a
    capital 'H' in this font is about height_px tall (measured, as font metrics differ
    between OpenCV versions). With a budget, the patch's size is refused before it is drawn."""
    probe = 4.0
    scale = probe * height_px / _ink("H", font, probe, thickness).shape[0]
    return _ink(text, font, scale, thickness, budget, where)


class Glyphs(SpriteTable):
    """One class per string in `texts`, one instance per font, in the given orders."""

    def __init__(self, texts: Sequence[str], fonts: Sequence[str] = DEFAULT_FONTS,
                 height_px: int = 20, thickness: int = 2, colour=(255, 255, 255)):
        texts = tuple(texts)  # a plain string "ABC" means the classes "A", "B", "C"
        fonts = (fonts,) if isinstance(fonts, str) else tuple(fonts)
        _check_texts(texts)
        codes = _font_codes(fonts)
        _check_sizes(height_px, thickness)
        self.texts, self.fonts = texts, fonts
        self.height_px, self.thickness = int(height_px), int(thickness)
        self.colour = parse_colour(colour, "objects.colour")
        self.classes = texts
        if len(texts) > MAX_CLASSES:
            raise SpecError(f"{len(texts):,} texts, above the limit of {MAX_CLASSES:,} classes (limits.MAX_CLASSES)",
                            where="objects.texts")
        budget = PixelBudget("MAX_SPRITE_PIXELS", "MAX_SOURCE_PIXELS", SpecError)
        self._sprites = tuple(self._row(ci, text, codes, budget) for ci, text in enumerate(texts))

    def _row(self, ci: int, text: str, codes, budget) -> tuple[Sprite, ...]:
        """The sprites of one text, one per font, refused if two fonts draw it identically."""
        row = []
        for inst, (fname, code) in enumerate(zip(self.fonts, codes)):
            ink = draw_text(text, code, self.height_px, self.thickness, budget, f"objects.texts[{ci}]")
            rgba = np.empty(ink.shape + (4,), dtype=np.uint8)
            rgba[..., :3] = self.colour
            rgba[..., 3] = ink
            row.append(Sprite.from_rgba(rgba, text, ci, inst, where=f"objects.texts[{ci}] in font {fname}"))
        _check_distinct(row, self.fonts, ci, self.thickness)
        return tuple(row)

    def __repr__(self) -> str:
        return (f"Glyphs(texts={list(self.texts)}, fonts={list(self.fonts)}, height_px={self.height_px}, "
                f"thickness={self.thickness}, colour={self.colour})")


def _check_texts(texts: tuple) -> None:
    if not texts:
        raise SpecError("needs at least one text", where="objects.texts")
    for i, t in enumerate(texts):
        if not isinstance(t, str) or not t.strip():
            raise SpecError(f"text {t!r} is empty", where=f"objects.texts[{i}]")
        if not all(32 <= ord(ch) < 127 for ch in t):
            raise SpecError(f"text {t!r} has characters outside printable ASCII, which the Hershey fonts "
                            f"cannot draw", where=f"objects.texts[{i}]")
    if len(set(texts)) != len(texts):
        dup = sorted({t for t in texts if texts.count(t) > 1})
        raise SpecError(f"texts repeat {dup}; each text is a class", where="objects.texts")


def _font_codes(fonts: tuple) -> list[int]:
    if not fonts:
        raise SpecError("needs at least one font", where="objects.fonts")
    if len(set(fonts)) != len(fonts):
        raise SpecError(f"fonts repeat: {list(fonts)}", where="objects.fonts")
    return [font_code(f) for f in fonts]


def _check_sizes(height_px, thickness) -> None:
    if not isinstance(height_px, (int, np.integer)) or height_px < 4:
        raise SpecError(f"height_px must be an integer >= 4, got {height_px!r}", where="objects.height_px")
    if height_px > MAX_SPRITE_SIDE:
        raise SpecError(f"height_px {height_px} is above the limit of {MAX_SPRITE_SIDE} (limits.MAX_SPRITE_SIDE)",
                        where="objects.height_px")
    if not isinstance(thickness, (int, np.integer)) or not 1 <= thickness <= height_px:
        raise SpecError(f"thickness must be a positive integer no larger than height_px ({height_px}), "
                        f"got {thickness!r}", where="objects.thickness")


def _check_distinct(row: list[Sprite], fonts: Sequence[str], ci: int, thickness: int) -> None:
    seen: dict[bytes, str] = {}
    for sprite, fname in zip(row, fonts):
        key = sprite.rgba.shape[:2] + (sprite.rgba[..., 3].tobytes(),)
        if key in seen:
            raise SpecError(
                f"fonts {seen[key]!r} and {fname!r} draw {sprite.class_name!r} identically at thickness {thickness} "
                f"with OpenCV {cv2.__version__}, so they cannot be different instances",
                where="objects.fonts", hint=f"try the default fonts {list(DEFAULT_FONTS)}")
        seen[key] = fname
