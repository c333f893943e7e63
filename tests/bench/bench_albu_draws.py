"""Benchmark: the albumentations transforms' draws against the planner's own draw_online.

Draws/s of RegionDraws (what RegionPlacement samples with) in its three paths — a batch from
the transform's generator, one item's own stream (item_key), one item of a given class
(class_key) — side by side with plan.draw.draw_online on the same number of uniforms, and the
same for a whole RegionPlacement call on a 64x64 photo. Aim: the transform's draw adds little
to the planner's (ratio of times near 1 for batches).

Run: python tests/bench/bench_albu_draws.py [--quick]. CPU time of this process
(time.process_time), contenders in turn within each repeat, best of the repeats.
"""

from __future__ import annotations

import argparse
import time

import albumentations as A
import numpy as np

from augsplit.albu import BATCH, RegionDraws, RegionPlacement
from augsplit.build import open_mapping
from augsplit.plan.draw import draw_online

SPEC = {"seed": 3, "canvas": {"width": 64, "height": 64},
        "objects": {"kind": "polyomino", "cells": 3, "cell_px": 2},
        "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "scale": {"range": [0.5, 1.0]},
                 "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}},
        "splits": {"train": {"region": {"minus": {"x": [0, 32], "hue": [0, 120]}}, "count": 10},
                   "test": {"region": {"x": [0, 32], "hue": [0, 120]}, "count": 10}}}


def best(fn, repeats: int) -> float:
    out = []
    for _ in range(repeats):
        t = time.process_time()
        fn()
        out.append(time.process_time() - t)
    return min(out)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats (a smoke run)")
    args = ap.parse_args()
    repeats, n = (2, 2000) if args.quick else (5, 10000)
    built = open_mapping(SPEC)
    draws = RegionDraws(built, "train")
    split = built.plan.split("train")
    k = draws.k
    u = np.random.default_rng(0).random((n, k))
    u_online = np.random.default_rng(0).random((n, k + 1))

    def batches():
        for i in range(0, n, BATCH):
            draws.draw_many(u[i:i + BATCH])

    def planner_batches():
        for i in range(0, n, BATCH):
            draw_online(built.plan, split, u_online[i:i + BATCH])

    def singles(c=None):
        for i in range(n // 10):
            draws.draw(u[i], c)

    def planner_singles():
        for i in range(n // 10):
            draw_online(built.plan, split, u_online[i:i + 1])

    print(f"draws of split 'train' ({n} in batches of {BATCH}, {n // 10} one at a time)")
    for label, ours, theirs, count in (("batch", batches, planner_batches, n),
                                       ("one item (item_key)", singles, planner_singles, n // 10),
                                       ("one item of class 1 (class_key)", lambda: singles(1), planner_singles, n // 10)):
        a, b = best(ours, repeats), best(theirs, repeats)
        print(f"  {label:34s} RegionDraws {count / a:9.0f}/s   draw_online {count / b:9.0f}/s   time ratio {a / b:4.2f}x")
    photo = np.random.default_rng(1).integers(0, 256, (16, 16, 3), dtype=np.uint8)
    c = A.Compose([RegionPlacement(built, "train", content_size=(16, 16))], seed=1)
    ck = A.Compose([RegionPlacement(built, "train", content_size=(16, 16), item_key="item")], seed=1)
    m = n // 10
    a = best(lambda: [c(image=photo) for _ in range(m)], repeats)
    b = best(lambda: [ck(image=photo, item=i) for i in range(m)], repeats)
    print(f"  RegionPlacement calls (16x16 photo): {m / a:7.0f}/s from the generator, {m / b:7.0f}/s with item_key")


if __name__ == "__main__":
    main()
