"""Helpers for the near-duplicate calibration tests and benchmark (import as `from lookalikes
import ...`): random clean specs, small datasets made in-process, and leaks planted into a
copy of a dataset folder (a train image copied, shifted 1 px, re-encoded as JPEG, or made a
little brighter, written over a test image)."""

from __future__ import annotations

import shutil
from pathlib import Path

import cv2
import numpy as np

from augsplit.build import open_mapping
from augsplit.generate import Options, generate
from augsplit.dataset import read_manifest

LETTERS = "AEFHKLMNTVXYZ"


def random_spec(seed: int) -> dict:
    """A clean spec drawn at random: canvas, objects, background, axes, and a held-out band
    of one axis (extrapolation or interpolation, parameter-disjoint from training), sometimes
    with an i.i.d. split drawn from the training region too."""
    rng = np.random.default_rng(seed)
    w, h = (int(v) for v in rng.choice([48, 64, 80, 96], size=2))
    if rng.random() < 0.6:
        objects = {"kind": "polyomino", "cells": int(rng.integers(3, 5)), "cell_px": int(rng.integers(3, 6))}
        if rng.random() < 0.5:
            objects["colour"] = [int(v) for v in rng.integers(40, 256, 3)]
    else:
        texts = list(rng.choice(list(LETTERS), size=int(rng.integers(2, 5)), replace=False))
        objects = {"kind": "glyphs", "texts": texts, "height_px": int(rng.integers(12, 22)), "thickness": 2}
    kind = str(rng.choice(["solid", "solid", "uniform_noise", "gaussian_noise", "pink_noise"]))
    background = {"kind": kind}
    if kind == "solid":
        background["value"] = float(np.round(rng.uniform(0, 0.6), 2))
    elif kind == "uniform_noise":
        background.update(lo=0.0, hi=float(np.round(rng.uniform(0.1, 0.5), 2)))
    elif kind == "gaussian_noise":
        background.update(mean=0.3, sd=float(np.round(rng.uniform(0.02, 0.12), 3)))
    else:
        background.update(mean=0.5, contrast=float(np.round(rng.uniform(0.05, 0.2), 3)))
    axes = {"x": {"range": [0, w]}, "y": {"range": [0, h]}}
    optional = {"scale": {"range": [0.7, 1.4], "dist": "log"}, "angle": {"range": [0, 360]},
                "hue": {"range": [0, 360]}, "brightness": {"range": [0.6, 1.0]}}
    for name in rng.permutation(list(optional))[: int(rng.integers(0, 4))]:
        axes[str(name)] = optional[str(name)]
    held = str(rng.choice(list(axes)))
    if rng.random() < 0.5:  # an edge band, or an interior one (the planner names the kind)
        train_at, test_at = [0.0, 0.6], [0.7, 1.0]
    else:
        train_at, test_at = [[0.0, 0.35], [0.65, 1.0]], [0.42, 0.58]
    band = (lambda at: {"band": {"axis": held, "at": at}}) if not isinstance(train_at[0], list) else None
    train_region = band(train_at) if band else {"any_of": [{"band": {"axis": held, "at": a}} for a in train_at]}
    splits = {"train": {"region": train_region, "per_class": int(rng.integers(12, 25))},
              "test": {"region": {"band": {"axis": held, "at": test_at}}, "per_class": int(rng.integers(5, 10))}}
    if rng.random() < 0.4:
        splits["test_iid"] = {"region": {"split": "train"}, "per_class": int(rng.integers(4, 8))}
    return {"seed": int(rng.integers(0, 2**31)), "canvas": {"width": w, "height": h, "mode": str(rng.choice(["rgb", "gray"]))},
            "objects": objects, "background": background, "axes": axes, "splits": splits,
            "guarantees": [{"disjoint": "parameters", "between": ["train", "test"]}]}


def make(spec: dict, out: Path, **options) -> Path:
    """Generate `spec` into `out` in this process (no progress bar)."""
    generate(None, out, Options(progress=False, **options), built=open_mapping(spec))
    return out


def _jpeg(img):
    ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, 90])
    return cv2.imdecode(buf, cv2.IMREAD_UNCHANGED)


def _shift(img):
    out = np.roll(img, 1, axis=1)
    out[:, 0] = out[:, 1]
    return out


def _brighter(img):
    return np.clip(img.astype(np.float32) * 1.08 + 4.0, 0, 255).astype(np.uint8)


LEAKS = {"copy": lambda img: img.copy(), "shift": _shift, "jpeg": _jpeg, "brightness": _brighter}


def plant(src: Path, dst: Path, kinds: list[str], per_kind: int = 1, seed: int = 0) -> list[tuple]:
    """Copy dataset folder `src` to `dst` and write leaks over test images (one distinct test
    image and one distinct train image per leak). Returns [(kind, test split, test id, source
    train ids)]: the source and every train image whose recorded pixels equal the source's
    (naming any of them names the source). The store must be image files; the file keeps its
    format (a .jpg leak is re-encoded)."""
    shutil.copytree(src, dst)
    m = read_manifest(dst)
    rng = np.random.default_rng(seed)
    train = m[m["split"] == "train"]
    test = m[m["split"] != "train"]
    per_kind = max(1, min(per_kind, len(test) // len(kinds), len(train) // len(kinds)))  # small splits: fewer
    n = len(kinds) * per_kind
    srcs = train.iloc[rng.choice(len(train), n, replace=False)]
    dsts = test.iloc[rng.choice(len(test), n, replace=False)]
    out = []
    for k, ((_, s), (_, d)) in enumerate(zip(srcs.iterrows(), dsts.iterrows())):
        kind = kinds[k // per_kind]
        img = cv2.imread(str(dst / s["file"]), cv2.IMREAD_UNCHANGED)
        assert cv2.imwrite(str(dst / d["file"]), LEAKS[kind](img))
        same = set(train.loc[train["sha256"] == s["sha256"], "image_id"]) | {s["image_id"]}
        out.append((kind, d["split"], d["image_id"], same))
    return out


def named(result, planted: list[tuple]) -> dict[str, list[bool]]:
    """Per leak kind: whether the near-duplicate check failed its pair and named each planted
    test image as a copy of its source train image."""
    out: dict[str, list[bool]] = {}
    for kind, split, test_id, sources in planted:
        c = next(c for c in result.checks if c.name == "near_duplicates" and c.pair[1] == split)
        w = c.worst
        hit = w[(w["test_id"] == test_id) & w["leak"]]
        out.setdefault(kind, []).append(c.verdict == "fail" and bool(hit["train_id"].isin(sources).any()))
    return out
