"""Perceptual hash speed against the imagehash library, per image size (issue: large images).

For each size from 64x64 to 1024x768, RGB images go through augsplit's DCT hash one call per
image (`phash`) and in batches of equal-sized images (`phash_batch`, the audit's path), and
through `imagehash.phash(Image.fromarray(img))`; every hash is checked bit for bit. Rounds are
interleaved and the best round of each is kept, so load on a shared machine hits both alike.
Prints images per second, the ratio (ours / imagehash, higher is faster) and PASS when ours
is at least as fast, MISS otherwise; also the load average it ran under.

    python tests/bench/bench_phash.py [--images 40] [--rounds 5]
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
import time

import cv2
import imagehash
import numpy as np
from PIL import Image

sys.path.insert(0, str(Path(__file__).resolve().parent))
from sidebyside import aim  # noqa: E402

from augsplit.audit.phash import phash, phash_batch

SIZES = [(64, 64), (96, 96), (128, 128), (256, 256), (512, 384), (640, 480), (800, 600), (1024, 768)]


def photos(w: int, h: int, n: int, seed: int = 0) -> list[np.ndarray]:
    """Smooth noise with a few filled polygons: photograph-like spectra, RGB uint8."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        img = cv2.GaussianBlur(rng.integers(0, 256, (h, w, 3), dtype=np.uint8), (0, 0), 3)
        for _ in range(3):
            pts = rng.integers(0, min(w, h), size=(5, 2)).astype(np.int32)
            cv2.fillPoly(img, [pts], color=tuple(int(c) for c in rng.integers(0, 256, 3)))
        out.append(img)
    return out


def best_rate(fn, n: int, rounds: list) -> None:
    t = time.perf_counter()
    fn()
    rounds.append(n / (time.perf_counter() - t))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--images", type=int, default=40)
    ap.add_argument("--rounds", type=int, default=5)
    a = ap.parse_args()
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores; {a.images} images per size, "
          f"best of {a.rounds} interleaved rounds")
    print(f"{'size':>10}  {'imagehash/s':>11}  {'ours 1/call/s':>13}  {'ratio':>5}  {'ours batch/s':>12}  {'ratio':>5}  aim")
    all_ok, worst = True, float("inf")
    for w, h in SIZES:
        imgs = photos(w, h, a.images)
        stack = np.stack(imgs)
        ref = [int(str(imagehash.phash(Image.fromarray(i))), 16) for i in imgs]
        assert [phash(i) for i in imgs] == ref, f"{w}x{h}: not bit-identical to imagehash"
        assert [int(v) for v in phash_batch(stack)] == ref, f"{w}x{h}: batch not bit-identical"
        r_ref, r_one, r_batch = [], [], []
        for _ in range(a.rounds):
            best_rate(lambda: [imagehash.phash(Image.fromarray(i)) for i in imgs], len(imgs), r_ref)
            best_rate(lambda: [phash(i) for i in imgs], len(imgs), r_one)
            best_rate(lambda: phash_batch(stack), len(imgs), r_batch)
        ref_rate, one, batch = max(r_ref), max(r_one), max(r_batch)
        ok = one >= ref_rate and batch >= ref_rate
        all_ok &= ok
        worst = min(worst, min(one, batch) / ref_rate)
        print(f"{w:>5}x{h:<4}  {ref_rate:>11.0f}  {one:>13.0f}  {one / ref_rate:>5.2f}  {batch:>12.0f}  "
              f"{batch / ref_rate:>5.2f}  {'PASS' if ok else 'MISS'}")
    print("aim (issue 14, outcome 8): at least as fast as imagehash at every size, bit-identical:",
          "PASS" if all_ok else "MISS")
    aim("perceptual hash at least as fast as imagehash, 64x64 to 1024x768, bit-identical",
        f"slowest size {worst:.2f}x imagehash", all_ok)


if __name__ == "__main__":
    main()
