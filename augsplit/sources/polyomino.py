"""Polyominoes: every free (or one-sided) n-cell shape, enumerated exactly and drawn as tiles.

Shapes grow cell by cell from the (n-1)-cell ones and are deduplicated by a canonical form
under the symmetry group (8 rotations/reflections for free, 4 rotations for one-sided).
"""

from __future__ import annotations

import numpy as np

from ..errors import SpecError
from .base import PixelBudget, Sprite, SpriteTable, parse_colour

Cells = tuple[tuple[int, int], ...]  # sorted (row, col) pairs, min row and min col are 0

_ROTATIONS = ((1, 0, 0, 1), (0, 1, -1, 0), (-1, 0, 0, -1), (0, -1, 1, 0))
_REFLECTIONS = ((1, 0, 0, -1), (0, 1, 1, 0), (-1, 0, 0, 1), (0, -1, -1, 0))
MAX_CELLS = 10  # 4655 free shapes; beyond this enumeration in Python gets slow and classes absurd


def normalise(cells) -> Cells:
    r0 = min(r for r, _ in cells)
    c0 = min(c for _, c in cells)
    return tuple(sorted((r - r0, c - c0) for r, c in cells))


def canonical(cells, one_sided: bool = False) -> Cells:
    """The least normalised image of `cells` under the symmetry group: equal iff congruent."""
    group = _ROTATIONS if one_sided else _ROTATIONS + _REFLECTIONS
    return min(normalise([(a * r + b * c, cc * r + d * c) for r, c in cells]) for a, b, cc, d in group)


def enumerate_polyominoes(n: int, one_sided: bool = False) -> tuple[Cells, ...]:
    """All n-cell polyominoes up to the symmetry group, each in canonical form, sorted."""
    if n < 1:
        raise ValueError("a polyomino has at least one cell")
    level = {((0, 0),)}
    for _ in range(n - 1):
        grown = set()
        for shape in level:
            occupied = set(shape)
            for r, c in shape:
                for nb in ((r + 1, c), (r - 1, c), (r, c + 1), (r, c - 1)):
                    if nb not in occupied:
                        grown.add(canonical(shape + (nb,), one_sided))
        level = grown
    return tuple(sorted(level))


def draw_cells(cells: Cells, cell_px: int, gap_px: int, colour: tuple[int, int, int]) -> np.ndarray:
    """RGBA patch with one opaque cell_px square per cell and gap_px of transparency between."""
    pitch = cell_px + gap_px
    rows = max(r for r, _ in cells) + 1
    cols = max(c for _, c in cells) + 1
    out = np.zeros((rows * pitch - gap_px, cols * pitch - gap_px, 4), dtype=np.uint8)
    for r, c in cells:
        out[r * pitch:r * pitch + cell_px, c * pitch:c * pitch + cell_px] = (*colour, 255)
    return out


class Polyominoes(SpriteTable):
    """Every polyomino of `cells` cells as a class ('P5-00', 'P5-01', ...), one instance each.

    `one_sided=True` counts mirror images as different classes (use it when the mirror axis
    is meant to change the class rather than be a nuisance transform).
    """

    def __init__(self, cells: int, cell_px: int, one_sided: bool = False,
                 colour=(255, 255, 255), gap_px: int = 0):
        if not isinstance(cells, (int, np.integer)) or not 1 <= cells <= MAX_CELLS:
            raise SpecError(f"cells must be an integer from 1 to {MAX_CELLS}, got {cells!r}", where="objects.cells")
        if not isinstance(cell_px, (int, np.integer)) or cell_px < 1:
            raise SpecError(f"cell_px must be a positive integer, got {cell_px!r}", where="objects.cell_px")
        if not isinstance(gap_px, (int, np.integer)) or gap_px < 0:
            raise SpecError(f"gap_px must be a non-negative integer, got {gap_px!r}", where="objects.gap_px")
        self.cells, self.cell_px, self.gap_px = int(cells), int(cell_px), int(gap_px)
        self.one_sided = bool(one_sided)
        self.colour = parse_colour(colour, "objects.colour")
        self.shapes = enumerate_polyominoes(self.cells, self.one_sided)
        budget = PixelBudget("MAX_SPRITE_PIXELS", "MAX_SOURCE_PIXELS", SpecError)
        pitch = self.cell_px + self.gap_px
        for shape in self.shapes:  # every patch's size, before any is drawn
            rows, cols = (max(v[k] for v in shape) + 1 for k in (0, 1))
            budget.take(cols * pitch - self.gap_px, rows * pitch - self.gap_px, "objects.cell_px")
        digits = max(2, len(str(len(self.shapes) - 1)))
        self.classes = tuple(f"P{self.cells}-{i:0{digits}d}" for i in range(len(self.shapes)))
        self._sprites = tuple(
            (Sprite.from_rgba(draw_cells(s, self.cell_px, self.gap_px, self.colour), name, i, 0),)
            for i, (s, name) in enumerate(zip(self.shapes, self.classes)))

    def __repr__(self) -> str:
        return (f"Polyominoes(cells={self.cells}, cell_px={self.cell_px}, one_sided={self.one_sided}, "
                f"colour={self.colour}, gap_px={self.gap_px})  # {len(self.classes)} classes")
