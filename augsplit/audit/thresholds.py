"""What the audit holds the data to: Thresholds, every value typed and range-checked."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..errors import DatasetError


@dataclass(frozen=True)
class Thresholds:
    """What the audit holds the data to. None means "nothing declared" for that property:
    the check then reports and warns instead of failing."""

    margin: float | None = None  # declared parameter margin, normalised units
    footprint_disjoint: bool | None = None  # declared: no shared pixel between the splits
    footprint_max_fraction: float = 0.0  # allowed fraction of overlapping test objects
    footprint_per_class: bool = True  # compare footprints within a class only (False: across classes too)
    # Hamming bits at or under which a test image's nearest train image is a candidate copy.
    # Candidates are then judged (audit/lookalike.py): by re-rendering on generated datasets,
    # else against the distances distinct training images show. A 1 px shift moves the hash by
    # up to 8 bits on noise backgrounds and up to 16 on flat ones (generated copies of changed
    # images are found by their DCT block instead; see lookalike.changed_rows).
    hash_radius: int = 8
    near_duplicates_fail: bool = True  # False: copies warn (pixel-identical copies still fail)
    duplicate_judge: str = "auto"  # "auto": judge candidates (see above); "radius": every candidate is a copy
    category_max_ratio: float | None = None  # fail when same/different-class IoU ratio exceeds it
    category_pairs: int = 2000
    seed: int = 0  # the category check's pair sampling and the near-duplicate null sample
    p: float = 2.0  # Minkowski p of parameter distances (2 = Euclidean)
    worst_k: int = 20
    thumbnails: int = 6
    hash_column: str = "phash"  # optional column of precomputed 64-bit hashes (int or hex)

    @classmethod
    def from_dict(cls, d: dict | None) -> "Thresholds":
        """Thresholds from a mapping, every value typed and range-checked: a DatasetError
        naming `thresholds.KEY` (with the closest known key for a misspelt one)."""
        d = dict(d or {})
        names = [f.name for f in dataclasses.fields(cls)]
        for k, v in d.items():
            if k not in names:
                import difflib

                close = difflib.get_close_matches(str(k), names, n=1)
                raise DatasetError(f"unknown threshold{f' (did you mean {close[0]!r}?)' if close else ''}; "
                                   f"known: {', '.join(sorted(names))}", where=f"thresholds.{k}")
        return cls(**d)

    def __post_init__(self):
        for f in dataclasses.fields(self):
            object.__setattr__(self, f.name, _typed(f.name, getattr(self, f.name)))


# name -> (type, lowest, highest, may be None); ranges are inclusive
_RULES = {
    "margin": (float, 0.0, None, True), "footprint_disjoint": (bool, None, None, True),
    "footprint_max_fraction": (float, 0.0, 1.0, False), "footprint_per_class": (bool, None, None, False),
    "hash_radius": (int, 0, 63, False), "near_duplicates_fail": (bool, None, None, False),
    "duplicate_judge": (("auto", "radius"), None, None, False),
    "category_max_ratio": (float, 0.0, None, True), "category_pairs": (int, 1, 10_000_000, False),
    "seed": (int, 0, 2**63 - 1, False), "p": (float, 1.0, float("inf"), False),
    "worst_k": (int, 0, 1_000_000, False), "thumbnails": (int, 0, 1000, False), "hash_column": (str, None, None, False),
}




def _typed(name: str, v):
    kind, lo, hi, nullable = _RULES[name]
    where = f"thresholds.{name}"
    if v is None:
        if nullable:
            return None
        raise DatasetError("needs a value", where=where)
    if isinstance(kind, tuple):
        return _choice(v, kind, where)
    if kind is bool:
        return _boolean(v, where)
    if kind is str:
        return _column_name(v, where)
    return _number(v, kind, lo, hi, where)


def _choice(v, choices: tuple, where: str):
    if v not in choices:
        raise DatasetError(f"must be one of {', '.join(choices)}, got {v!r}", where=where)
    return v


def _boolean(v, where: str) -> bool:
    if not isinstance(v, (bool, np.bool_)):
        raise DatasetError(f"must be true or false, got {v!r}", where=where)
    return bool(v)


def _column_name(v, where: str) -> str:
    if not isinstance(v, str) or not v:
        raise DatasetError(f"must be a column name, got {v!r}", where=where)
    return v


def _number(v, kind: type, lo, hi, where: str):
    ok = isinstance(v, (int, np.integer)) if kind is int else isinstance(v, (int, float, np.integer, np.floating))
    if isinstance(v, (bool, np.bool_)) or not ok:
        noun = "an integer" if kind is int else "a number"
        raise DatasetError(f"must be {noun}, got {v!r}", where=where)
    v = kind(v)
    if v != v or (v in (float("inf"), float("-inf")) and hi != float("inf")):
        raise DatasetError(f"must be finite, got {v!r}", where=where)
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        rng = f"at least {lo:g}" if hi is None else f"in [{lo:g}, {hi:g}]"
        raise DatasetError(f"must be {rng}, got {v:g}", where=where)
    return v
