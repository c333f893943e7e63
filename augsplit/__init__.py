"""augsplit: datasets whose test splits come from whole regions of transform space.

The public API (everything else is internal and may change):

Specs and plans
    open_spec(path)          load, validate and plan a spec -> Built (.spec, .plan, .source)
    builtin_spec_path(name)  the path of a spec shipped with augsplit ("demo")
Regions of transform space (values: ``==``, ``|`` union, ``-`` difference, ``&``)
    Region                   a finite union of boxes; .contains(points), .mass()
    box(space, x=(0, 5))     axes in intervals of their own units (circular ones may wrap)
    band(space, axis, at)    a slab of one axis, in fractions of its range
    cells(space, grid, pick) grid cells: a list, "checkerboard", "checkerboard_odd", "all"
    by_class(space, classes, {name: region, "*": region})   a region per class
Datasets
    generate_dataset(spec, out, **options)   make (or resume) a dataset folder
    open_dataset(path)       open and check a dataset folder -> DatasetFolder
    Dataset(path, split)     map-style dataset of a split (torch DataLoader ready)
    OnlineSampler(spec, split)  unlimited fresh images of a split's region
    ParamLog(folder), read_log(folder)   the log of every online draw
Augmentation (albumentations transforms)
    RegionPlacement, HeldOutPlacement, RegionColour
Checks
    audit_dataset(path)      leakage audit of a dataset folder -> AuditResult
    audit_table(table, spec) leakage audit of a parameter log or table
    score_predictions(dataset, predictions)  accuracy against distance from training
Errors
    AugsplitError (base), SpecError, DatasetError

Names are imported on first use (PEP 562), so ``import augsplit`` loads neither pandas nor
OpenCV. ``python -m augsplit`` runs the command line.
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

# public name -> module that defines it
_PUBLIC = {
    "open_spec": "augsplit.api",
    "builtin_spec_path": "augsplit.api",
    "Region": "augsplit.space.region",
    "box": "augsplit.space.builders",
    "band": "augsplit.space.builders",
    "cells": "augsplit.space.builders",
    "by_class": "augsplit.space.builders",
    "generate_dataset": "augsplit.api",
    "open_dataset": "augsplit.dataset.folder",
    "Dataset": "augsplit.data",
    "OnlineSampler": "augsplit.data",
    "ParamLog": "augsplit.paramlog",
    "read_log": "augsplit.paramlog",
    "RegionPlacement": "augsplit.albu",
    "HeldOutPlacement": "augsplit.albu",
    "RegionColour": "augsplit.albu",
    "audit_dataset": "augsplit.audit.entry",
    "audit_table": "augsplit.audit.entry",
    "score_predictions": "augsplit.api",
    "AugsplitError": "augsplit.errors",
    "SpecError": "augsplit.errors",
    "DatasetError": "augsplit.errors",
}

__all__ = list(_PUBLIC)


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'augsplit' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # the next lookup is a plain attribute
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_PUBLIC))
