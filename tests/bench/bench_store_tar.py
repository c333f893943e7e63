"""Benchmark of `generate --store tar` against `--store parquet`: time per image, one worker,
the CLI's shard size, on the same 96x96 RGB spec as bench_generate.py. Rounds alternate the
two stores (parquet, tar, parquet, tar ...) so a change in the machine's load hits both; each
figure is the best round. Aim: tar within 1.3x of parquet per image.

    python tests/bench/bench_store_tar.py [--n 3000] [--rounds 3] [--tmp DIR]
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve()
sys.path.insert(0, str(HERE.parents[2]))
sys.path.insert(0, str(HERE.parent))

from bench_generate import spec_dict  # noqa: E402
from sidebyside import aim, scratch  # noqa: E402

from augsplit.build import build  # noqa: E402
from augsplit.generate import Options, generate  # noqa: E402
from augsplit.spec import parse_spec  # noqa: E402

AIM = 1.3


def run(built, out: Path, store: str) -> float:
    shutil.rmtree(out, ignore_errors=True)
    t = time.perf_counter()
    generate(None, out, Options(store=store, shard_size=500, progress=False), built=built)
    return time.perf_counter() - t


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=3000)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--tmp", default=None)
    a = ap.parse_args()
    tmp = scratch(a.tmp, "bench-tar-")
    cores = os.cpu_count() or 1
    built = build(parse_spec(spec_dict(a.n)), tmp)
    print(f"{a.n} images 96x96 RGB, shard 500, 1 worker, in {tmp}; load before {os.getloadavg()[0]:.2f} on {cores} cores")
    run(built, tmp / "warm", "parquet")  # imports, plan, first-use caches
    best = {"parquet": float("inf"), "tar": float("inf")}
    for r in range(a.rounds):
        for store in ("parquet", "tar"):
            best[store] = min(best[store], run(built, tmp / store, store))
        print(f"round {r + 1}: " + ", ".join(f"{s} {1e6 * t / a.n:.0f} us/image" for s, t in best.items()))
    ratio = best["tar"] / best["parquet"]
    load = os.getloadavg()[0]
    note = f" (measured under load {load:.2f} > {cores} cores: unreliable)" if load > cores else ""
    print(f"--store parquet {1e6 * best['parquet'] / a.n:.0f} us/image, --store tar {1e6 * best['tar'] / a.n:.0f} "
          f"us/image: tar/parquet = {ratio:.2f}x (aim <= {AIM}x): {'PASS' if ratio <= AIM else 'MISS'}{note}")
    sizes = {s: sum(p.stat().st_size for p in (tmp / s).rglob("*") if p.is_file()) for s in best}
    aim(f"--store tar within {AIM}x of --store parquet per image",
        f"{1e6 * best['tar'] / a.n:.0f} vs {1e6 * best['parquet'] / a.n:.0f} us = {ratio:.2f}x", ratio <= AIM)
    print("bytes per image: " + ", ".join(f"{s} {v / a.n:.0f}" for s, v in sizes.items()))


if __name__ == "__main__":
    main()
