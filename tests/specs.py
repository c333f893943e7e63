"""Small in-memory specs shared by tests (import as `from specs import spec_dict`)."""

from __future__ import annotations

import copy

BASE = {
    "seed": 1,
    "canvas": {"width": 64, "height": 64, "mode": "gray"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 4},
    "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}},
    "splits": {"train": {"region": {"x": [0, 20]}, "per_class": 4},
               "test": {"region": {"x": [44, 64]}, "per_class": 2}},
}


def spec_dict(**changes) -> dict:
    """A copy of BASE with top-level keys replaced."""
    d = copy.deepcopy(BASE)
    d.update(copy.deepcopy(changes))
    return d
