"""What score reads from a dataset folder: the manifest columns it needs, the splits' roles
(training split, i.i.d. reference), whether the protocol is per class, and circular axis ranges.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from augsplit.errors import AugsplitError, DatasetError
from augsplit.space.axes import AXIS_COLUMNS, CLASS

from .distance import DISTANCE_AXES, VALUE_AXES

ROW_COLUMNS = ("image_id", "split", "split_index", "index", "class_name", "class_index", "cell", *AXIS_COLUMNS)
# the axis columns come from the catalogue (space/axes.py) and the axis lists in distance.py
MANIFEST_COLUMNS = tuple(dict.fromkeys(ROW_COLUMNS + tuple(c for ax in DISTANCE_AXES for c in ax.columns)
                                       + tuple(ax.column for ax in VALUE_AXES)))
CIRCULAR_COLUMNS = tuple(ax.column for ax in VALUE_AXES if ax.kind == "circular")


def read_manifest(dataset_dir) -> pd.DataFrame:
    """The image table of a dataset folder, opened and checked by augsplit.dataset (an
    unfinished or mixed folder is refused)."""
    from augsplit.dataset import open_dataset

    return manifest_of(open_dataset(dataset_dir))


def manifest_of(folder) -> pd.DataFrame:
    """The columns scoring needs, of an opened dataset folder. Its attrs say where it is read
    from, whether the protocol is per class (and why), and each circular axis's lower bound."""
    from augsplit.dataset import read_rows
    from augsplit.dataset.layout import MANIFEST_DIR

    where = str(folder.root / MANIFEST_DIR)
    df = read_rows(folder, columns=MANIFEST_COLUMNS)
    if df.empty:
        raise DatasetError("manifest has no rows", where=where)
    reason = per_class_protocol(folder)
    df.attrs.update(where=where, per_class=reason is not None, per_class_reason=reason, axis_lo=circular_lo(folder))
    return df


def dataset_roles(folder) -> tuple[str | None, str | None]:
    """(training split, reference split) from an opened dataset's summary, when it names them.

    The reference is a test split drawn at random from the training region (kind "random"):
    its accuracy is the in-region accuracy a held-out split should be compared with, free of
    the optimism of scoring the very images the model was fitted to.
    """
    splits = (folder.summary or {}).get("splits") or {}
    train = [n for n, s in splits.items() if isinstance(s, dict) and s.get("role") == "train"]
    iid = [n for n, s in splits.items() if isinstance(s, dict) and s.get("kind") == "random" and s.get("role") != "train"]
    return (train[0] if len(train) == 1 else None), (iid[0] if len(iid) == 1 else None)


def circular_lo(folder) -> dict[str, float]:
    """The lower end of each circular axis's range in the spec (values wrap into [lo, lo + 360))."""
    axes = getattr(folder.spec, "axes", None) or {}
    return {name: float(axes[name].range[0]) for name in CIRCULAR_COLUMNS
            if name in axes and getattr(axes[name], "range", None)}


def per_class_protocol(folder) -> str | None:
    """Why distance from training must be measured within each class, or None when it need not.

    The protocol is per class when a guarantee holds per class, or when a split's region
    differs from class to class (each class is trained and tested on its own places). Read
    from the plan; from the spec's guarantees when the plan cannot be made (objects moved)."""
    try:
        plan = folder.plan
    except AugsplitError:
        from augsplit.plan.settings import settings_of

        pairs = [c.between for c in settings_of(folder.spec).claims if c.per_class]
        return _guarantee_reason(pairs)
    reason = _guarantee_reason([v.between for v in plan.verdicts if v.per_class])
    if reason:
        return reason
    differing = [s.name for s in plan.splits if _differs_by_class(s)]
    if not differing:
        return None
    return f"split{'s' if len(differing) > 1 else ''} {', '.join(differing)} draw{'' if len(differing) > 1 else 's'} " \
        "each class from its own region"


def _guarantee_reason(pairs) -> str | None:
    if not pairs:
        return None
    return "the guarantee between " + "; ".join(" and ".join(p) for p in pairs) + " is per class"


def _differs_by_class(split) -> bool:
    """Whether the split draws some two of its classes from mostly different places: their
    regions share less than half of the smaller one's mass. (Small per-class differences, as
    `keep_inside` makes for objects of different sizes, do not count; the half is common
    practice, no source.)"""
    used = [c for c, n in enumerate(split.counts) if n > 0]
    if len(used) < 2 or CLASS not in split.region.space.index:
        return False
    ci = split.region.space.index[CLASS]
    first = split.class_region(used[0])
    for c in used[1:]:
        r = split.class_region(c)
        shift = np.zeros(r.space.ndim)
        shift[ci] = used[0] - c
        moved = type(r)(r.space, r.lo + shift, r.hi + shift)
        if (moved & first).mass() < 0.5 * min(moved.mass(), first.mass()):
            return True
    return False
