"""Benchmark of what durable commits cost: the same serial `generate` (64x64 grey canvas,
three-cell polyominoes, one image per file or embedded in Parquet) made durable as augsplit
does it (an fsync per single file, one syncfs per batch of image files), side by side with
two baselines: (a) nothing synced (fsync and syncfs do nothing) and (b) an fsync per image
file (syncfs unavailable). Prints seconds per 1000 images and ratios to (a). The three runs
alternate and each figure is the best of --repeat (shared machines are noisy). The output
folder's file system decides the figure: run it where datasets live.

    python tests/bench/bench_durable.py [--n 2000] [--repeat 3] [--tmp DIR]
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

import augsplit.io as aio
from augsplit.build import open_mapping
from augsplit.generate import Options, generate

SPEC = {
    "seed": 1,
    "canvas": {"width": 64, "height": 64, "mode": "gray"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 4},
    "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
}


def run(n: int, store: str, folder: Path, mode: str) -> float:
    """Seconds per 1000 images; mode "off" (nothing synced), "fsync" (an fsync per file) or
    "augsplit" (as shipped)."""
    per_class = max(1, n // 2 // 2)  # two splits, two classes of polyomino by default
    spec = dict(SPEC, splits={"train": {"region": {"x": [0, 20]}, "per_class": per_class},
                              "test": {"region": {"x": [44, 64]}, "per_class": per_class}})
    built = open_mapping(spec)
    out = folder / f"{store}-{mode}"
    shutil.rmtree(out, ignore_errors=True)
    real, real_syncfs = os.fsync, aio.syncfs
    if mode != "augsplit":
        aio.syncfs = lambda path: False
    if mode == "off":
        os.fsync = lambda fd: None
    try:
        t = time.perf_counter()
        summary = generate(None, out, Options(progress=False, store=store, shard_size=250), built=built)
        return (time.perf_counter() - t) / summary["images"] * 1000
    finally:
        os.fsync, aio.syncfs = real, real_syncfs
        shutil.rmtree(out, ignore_errors=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=2000, help="images per timed run")
    ap.add_argument("--repeat", type=int, default=3, help="runs per figure; the best is kept")
    ap.add_argument("--tmp", default=None, help="folder for the outputs (default: the system's temp folder)")
    a = ap.parse_args()
    folder = Path(tempfile.mkdtemp(dir=a.tmp, prefix="bench-durable-"))
    try:
        modes = ("off", "fsync", "augsplit")
        print(f"{'store':8} {'(a) off':>9} {'(b) fsync each':>15} {'augsplit':>9}   s/1000 images; ratios to (a)")
        for store in ("files", "parquet"):
            best = {m: float("inf") for m in modes}
            for _ in range(a.repeat):
                for m in modes:
                    best[m] = min(best[m], run(a.n, store, folder, m))
            print(f"{store:8} {best['off']:9.3f} {best['fsync']:15.3f} {best['augsplit']:9.3f}   "
                  f"(b)/(a) {best['fsync'] / best['off']:.2f}, augsplit/(a) {best['augsplit'] / best['off']:.2f}")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
