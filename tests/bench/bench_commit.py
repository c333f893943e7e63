"""Benchmark of where shards are committed: this tree against an earlier commit, side by side.

Since 2026-12-03 local pool workers render and write a shard and the main process syncs and
commits it (`executors.finish_overlapped`), where each worker used to sync and commit its own
and sit idle while the disk caught up. This script times `augsplit generate` at 1 and 2
workers for `--store files` and `--store parquet`, on the disk holding --disk (default: this
worktree) and on tmpfs, with this tree's augsplit and with the one at --against, each run in a
fresh Python, every configuration once per round (interleaved), the best of --rounds kept.

    python tests/bench/bench_commit.py [--against 9a412ba] [--n 20000] [--rounds 3] [--disk DIR]

Prints per configuration the seconds of both trees and this tree's speed-up (the earlier
time over this one: above 1.0x is faster), and the 2-over-1-worker ratio of each tree. The
load average is printed before and after: on a shared machine a ratio under a load above the
core count says little.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve()
sys.path.insert(0, str(HERE.parent))

from sidebyside import ROOT, child, export, load  # noqa: E402


def run_child(n: int, store: str, workers: int, out: str) -> None:
    """In a fresh Python: generate n images and print the seconds it took as JSON."""
    import bench_generate as bg
    from augsplit.build import open_mapping
    from augsplit.generate import Options, generate

    built = open_mapping(bg.spec_dict(n))
    t0 = time.perf_counter()
    generate(None, out, Options(progress=False, store=store, workers=workers, shard_size=500), built=built)
    print(json.dumps({"seconds": time.perf_counter() - t0}))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--against", default="9a412ba", help="the git ref to compare with")
    ap.add_argument("--n", type=int, default=20000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--disk", default=str(ROOT), help="a folder on the real disk to measure")
    ap.add_argument("--child", nargs=4, metavar=("N", "STORE", "WORKERS", "OUT"), help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        n, store, workers, out = a.child
        run_child(int(n), store, int(workers), out)
        return
    old = export(a.against)
    places = [Path(tempfile.mkdtemp(prefix=".bench-commit-", dir=a.disk)), Path(tempfile.mkdtemp(dir="/dev/shm"))]
    trees = {"this": None, a.against: old}
    configs = [(store, place, w) for place in places for store in ("files", "parquet") for w in (1, 2)]
    best: dict = {}
    runs = 0
    print(f"== {a.n} images, shard 500, best of {a.rounds} interleaved rounds; before: {load()}")
    try:
        for _ in range(a.rounds):
            for store, place, w in configs:
                for name, tree in trees.items():
                    os.sync()
                    out = place / f"ds-{runs}"  # never reused: deleting files makes ext4's next creations slow
                    runs += 1
                    t = child(HERE, ["--child", str(a.n), store, str(w), str(out)], tree=tree)["seconds"]
                    key = (store, str(place), w, name)
                    best[key] = min(best.get(key, float("inf")), t)
    finally:
        for p in places:
            shutil.rmtree(p, ignore_errors=True)
        shutil.rmtree(old, ignore_errors=True)
    print(f"after: {load()}")
    print(f"{'store':8s} {'on':6s} {'workers':>7s} {a.against + ' s':>10s} {'this s':>8s} {'speed-up':>9s}")
    for store, place, w in configs:
        was, now = best[store, str(place), w, a.against], best[store, str(place), w, "this"]
        fs = "tmpfs" if str(place).startswith("/dev/shm") else "disk"
        print(f"{store:8s} {fs:6s} {w:7d} {was:10.3f} {now:8.3f} {was / now:8.2f}x")
    for store, place, w in configs:
        if w == 2:
            fs = "tmpfs" if str(place).startswith("/dev/shm") else "disk"
            ratios = [best[store, str(place), 1, t] / best[store, str(place), 2, t] for t in (a.against, "this")]
            print(f"2 workers over 1, {store} on {fs}: {a.against} {ratios[0]:.2f}x, this {ratios[1]:.2f}x")


if __name__ == "__main__":
    main()
