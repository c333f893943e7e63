"""Benchmark of `augsplit verify`: peak memory at two dataset sizes (aim: flat, the large one
within 1.2x of the small one, from 100k to 2M rows) and rows checked per second.

Each dataset is a tiny-canvas spec made with `--store none` (rows are what verify streams;
the image work per row is not what this measures), and verify runs with `--sample 1` so the
run is dominated by reading and checking rows. Peak RSS is measured in a fresh subprocess per
size (resource.getrusage, ru_maxrss). Prints the machine's load: ratios measured under a load
above the number of cores are flagged.

    python tests/bench/bench_verify.py [--small 100000] [--large 2000000] [--workers 2] [--tmp DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path


sys.path.insert(0, str(Path(__file__).resolve().parent))
from sidebyside import aim, make_dataset, scratch  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
AIM = 1.2  # peak RSS of the large run over the small one: "flat" with room for allocator noise


def spec(n: int) -> dict:
    return {"seed": 3, "canvas": {"width": 8, "height": 8, "mode": "gray"},
            "objects": {"kind": "polyomino", "cells": 1, "cell_px": 2}, "axes": {"x": {"range": [2, 6]}},
            "splits": {"train": {"region": {"x": [2, 3]}, "count": n - n // 10},
                       "test": {"region": {"x": [5, 6]}, "count": n // 10}}}


CHILD = """
import json, resource, sys, time
from augsplit.verify import verify
t = time.perf_counter()
rep = verify(sys.argv[1], sample=1)
dt = time.perf_counter() - t
print(json.dumps({"ok": rep.ok, "rows": rep.checked, "seconds": dt,
                  "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def env() -> dict:
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + os.pathsep + e.get("PYTHONPATH", "")
    return e


def make(n: int, tmp: Path, workers: int) -> Path:
    return make_dataset(spec(n), tmp / f"rows-{n}", "none", workers)


def measure(root: Path) -> dict:
    proc = subprocess.run([sys.executable, "-c", CHILD, str(root)], check=True, capture_output=True, text=True,
                          env=env())
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--small", type=int, default=100_000)
    ap.add_argument("--large", type=int, default=2_000_000)
    ap.add_argument("--workers", type=int, default=2, help="workers for making the datasets")
    ap.add_argument("--tmp", default=None)
    a = ap.parse_args()
    tmp = scratch(a.tmp, "bench-verify-")
    cores = os.cpu_count() or 1
    print(f"load before: {os.getloadavg()[0]:.2f} on {cores} cores")
    got = {}
    for n in (a.small, a.large):
        root = make(n, tmp, a.workers)
        got[n] = measure(root)
        r = got[n]
        print(f"verify {n:>9,} rows: peak RSS {r['peak_mib']:7.1f} MiB, {r['seconds']:7.1f} s "
              f"({r['rows'] / r['seconds']:,.0f} rows/s), ok={r['ok']}")
    ratio = got[a.large]["peak_mib"] / got[a.small]["peak_mib"]
    load = os.getloadavg()[0]
    verdict = "PASS" if ratio <= AIM else "MISS"
    note = f" (load {load:.2f} > {cores} cores: timing unreliable; memory still valid)" if load > cores else ""
    print(f"peak RSS {a.large:,} / {a.small:,} rows = {ratio:.2f}x (aim <= {AIM}x): {verdict}{note}")
    aim(f"verify memory flat from {a.small:,} to {a.large:,} rows (within {AIM}x)",
        f"{got[a.small]['peak_mib']:.0f} / {got[a.large]['peak_mib']:.0f} MiB = {ratio:.2f}x", ratio <= AIM)


if __name__ == "__main__":
    main()
