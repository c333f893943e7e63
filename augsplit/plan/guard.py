"""auto_guard for footprints: the narrowest guard band the planner's own proof accepts.

The band is the first split's positions grown by g px (`dilate_positions`), taken out of the
second split's region. g is the smallest multiple of GUARD_STEP_PX for which the full
footprint proof (disc bound, rasterised envelopes, exact search) succeeds, found by
bisection: the disc bound alone only gives an upper end, and can be far too wide (a thin
line needs its whole length as a disc, but only its thickness across it). So a spec whose
second split, kept g px from the first, is proved keeps at least that part after auto_guard,
when g lies on the grid (otherwise up to one GUARD_STEP_PX more is taken).
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np

from ..space.region import Region
from ..units import Canvas
from .guarantees import dilate_positions

GUARD_STEP_PX = 1.0 / 16.0


def band(canvas: Canvas, A: Region, g_px: float, per_class: bool) -> Region:
    """Every parameter point whose position lies within g_px of a position of A (a superset)."""
    return dilate_positions(A.space, canvas, A, np.full(A.nbox, float(g_px)), per_class)


def footprint_guard(proves: Callable[[Region], bool], canvas: Canvas, A: Region, B: Region, start_px: float,
                    per_class: bool) -> tuple[Region, float]:
    """(the band to remove from B, its width g in px): the smallest g on the grid for which
    `proves(B - band(g))` holds. `start_px` is a width expected to suffice (the disc bound's
    need); it is doubled until the proof holds, up to the canvas diagonal (then that band is
    returned and the caller's final proof reports the failure). Assumes the proof is monotone
    in g: a subset of a proved region is proved."""
    def guard(k: int) -> Region:
        return band(canvas, A, k * GUARD_STEP_PX, per_class)

    limit = int(math.ceil(2 * math.hypot(canvas.width, canvas.height) / GUARD_STEP_PX))
    lo = -1  # no band at all: known to fail (that is why auto_guard runs)
    hi = max(1, int(math.ceil(start_px / GUARD_STEP_PX)) + 1)
    while not proves(B - guard(hi)):
        if hi >= limit:
            return guard(hi), hi * GUARD_STEP_PX
        lo, hi = hi, min(2 * hi, limit)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if proves(B - guard(mid)):
            hi = mid
        else:
            lo = mid
    return guard(hi), hi * GUARD_STEP_PX
