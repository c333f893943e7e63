"""Benchmark: loaders and the albumentations plugin against their baselines, side by side.

1. Items/s of a lazily rendered dataset (store none: every item re-rendered from its manifest
   row) against the same images read from PNG files — by our Dataset (store files) and by a
   bare cv2.imread loop. Aim: lazy at least as fast as PNG decode (ratio >= 1).
2. Items/s of RegionPlacement against albumentations' own A.Affine on the same images (and with
   mask, bboxes and keypoints), both inside A.Compose. Aim: the plugin within 1.2x (ratio of
   times <= 1.2).

Run: python tests/bench/bench_data.py [--quick]. Times are CPU time of this process
(time.process_time: what other jobs on a shared machine do is not counted), contenders are
run in turn within each repeat, and each gets the best of its repeats.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import albumentations as A
import cv2
import numpy as np

from augsplit.albu import RegionPlacement
from augsplit.build import open_mapping, open_spec
from augsplit.data import Dataset
from augsplit.generate import Options, generate
from augsplit.spec import builtin_spec_path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from sidebyside import aim  # noqa: E402

# one OpenCV thread, as in a loader's worker process (threads.one_opencv_thread_in_workers) and every
# augsplit command: with its default pool OpenCV's idle threads spin, and the CPU they burn on an
# idle machine doubled the measured cost of a lazy item (0.55x vs 1.09x, 2026-12-02)
cv2.setNumThreads(1)

NOISE96 = {
    "seed": 7,
    "canvas": {"width": 96, "height": 96, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 5, "cell_px": 5, "colour": [240, 200, 40]},
    "background": {"kind": "pink_noise", "mean": 0.5, "contrast": 0.15},
    "axes": {"x": {"range": [10, 86]}, "y": {"range": [10, 86]}, "scale": {"range": [0.75, 1.5], "dist": "log"},
             "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}},
    "splits": {"train": {"region": {"x": [10, 40]}, "per_class": 40}, "test": {"region": {"x": [56, 86]}, "per_class": 10}},
}


def best_rates(fns: list, n: int, repeats: int) -> list[float]:
    """Items per second of each fn (each handles n items): best of `repeats`, run in turn."""
    best = [float("inf")] * len(fns)
    for _ in range(repeats):
        for k, fn in enumerate(fns):
            t0 = time.process_time()
            fn()
            best[k] = min(best[k], time.process_time() - t0)
    return [n / b for b in best]


def bench_loaders(name: str, built, tmp: Path, repeats: int) -> None:
    roots = {}
    for store in ("files", "none"):
        roots[store] = tmp / f"{name}-{store}"
        generate(None, roots[store], Options(store=store, progress=False), built=built)
    lazy, png = Dataset(roots["none"], "train"), Dataset(roots["files"], "train")
    n = len(lazy)
    files = [str(roots["files"] / f) for f in png.manifest["file"]]
    flag = cv2.IMREAD_GRAYSCALE if png.channels == 1 else cv2.IMREAD_COLOR

    def read_png():
        for f in files:
            img = cv2.imread(f, flag)
            if png.channels == 3:
                cv2.cvtColor(img, cv2.COLOR_BGR2RGB)

    def run(ds):
        for i in range(n):
            ds[i]

    r_lazy, r_png, r_raw = best_rates([lambda: run(lazy), lambda: run(png), read_png], n, repeats)
    h, w = lazy.hw
    print(f"{name} ({w}x{h}, {n} items)")
    print(f"  lazy re-render (Dataset, store none) {r_lazy:9.0f} items/s")
    print(f"  PNG files      (Dataset, store files){r_png:9.0f} items/s   lazy / png     = {r_lazy / r_png:5.2f}x")
    print(f"  PNG decode     (bare cv2.imread)     {r_raw:9.0f} items/s   lazy / imread  = {r_lazy / r_raw:5.2f}x")
    aim(f"lazy items at least as fast as reading their PNG files, {name}",
        f"{r_lazy:.0f} vs {r_png:.0f} items/s = {r_lazy / r_png:.2f}x", r_lazy >= r_png)


def photos(n: int, size: int, seed: int = 0) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):  # smooth random images, like photographs rather than white noise
        small = rng.integers(0, 256, (size // 8, size // 8, 3), dtype=np.uint8)
        out.append(cv2.resize(small, (size, size), interpolation=cv2.INTER_CUBIC))
    return out


def bench_plugin(size: int, repeats: int, n: int) -> None:
    spec = {"seed": 3, "canvas": {"width": size, "height": size},
            "objects": {"kind": "polyomino", "cells": 2, "cell_px": 2},
            "axes": {"x": {"range": [0, size]}, "y": {"range": [0, size]}, "scale": {"range": [0.5, 1.0]},
                     "angle": {"range": [0, 360]}},
            "splits": {"train": {"region": {"x": [0, size / 2]}, "count": 10},
                       "test": {"region": {"x": [size / 2, size]}, "count": 10}}}
    built = open_mapping(spec)
    imgs = photos(n, size)
    mask = np.zeros((size, size), np.uint8)
    mask[size // 4: size // 2, size // 4: size // 2] = 1
    boxes = [[size * 0.1, size * 0.2, size * 0.5, size * 0.6], [size * 0.4, size * 0.4, size * 0.9, size * 0.8]]
    kps = [[size * 0.3, size * 0.3], [size * 0.7, size * 0.2], [size * 0.5, size * 0.9]]
    bp = A.BboxParams(format="pascal_voc", label_fields=["labels"])
    kp = A.KeypointParams(format="xy", remove_invisible=False)
    ours = RegionPlacement(built, "train", content_size=(size, size))
    theirs = A.Affine(scale=(0.5, 1.0), rotate=(0, 360), translate_px=(-size // 4, size // 4), p=1.0)
    print(f"plugin vs A.Affine ({size}x{size} images, {n} calls, inside A.Compose)")
    for label, full in (("image only", False), ("image+mask+bboxes+keypoints", True)):
        runs = []
        for t in (ours, theirs):
            c = A.Compose([t], seed=1, bbox_params=bp, keypoint_params=kp) if full else A.Compose([t], seed=1)

            def run(c=c):
                for img in imgs:
                    if full:
                        c(image=img, mask=mask, bboxes=boxes, labels=[0, 1], keypoints=kps)
                    else:
                        c(image=img)

            runs.append(run)
        rates = best_rates(runs, n, repeats)
        print(f"  {label:28s} ours {rates[0]:8.0f}/s   A.Affine {rates[1]:8.0f}/s   "
              f"time ours / A.Affine = {rates[1] / rates[0]:4.2f}x")
        aim(f"RegionPlacement within 1.2x of A.Affine, {size}x{size}, {label}",
            f"{rates[1] / rates[0]:.2f}x the time", rates[1] / rates[0] <= 1.2)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats (a smoke run)")
    args = ap.parse_args()
    repeats = 2 if args.quick else 5
    with tempfile.TemporaryDirectory() as tmp:
        bench_loaders("demo spec (grey, solid background)", open_spec(builtin_spec_path()), Path(tmp), repeats)
        bench_loaders("rgb spec (pink-noise background)", open_mapping(NOISE96), Path(tmp), repeats)
    for size in (64, 256):
        bench_plugin(size, repeats, 300 if args.quick else 1000)


if __name__ == "__main__":
    main()
