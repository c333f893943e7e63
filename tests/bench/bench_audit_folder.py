"""Benchmark of `augsplit audit DIR` on a real dataset folder: 96x96 RGB images stored with
`--store parquet` (made with `augsplit generate --workers 2`), three splits (train 80 %, a
held-out test 10 %, an i.i.d. split 10 %: two audited pairs sharing the train split).

For each size, `augsplit audit DIR --quiet` runs in a fresh process at 1 and at 2 workers (and,
with --ref, the audit at a git ref, single process), in interleaved rounds; wall time and peak
memory (ru_maxrss of the child) are the best of the rounds. The 1,000,000-image figures come
from --sizes: the largest size measured when it is 1,000,000, else a straight line through the
two largest sizes (the work is linear in rows: hashing and masks per row, checks by sorting and
counting), extended to 1,000,000; the report says which.

    python tests/bench/bench_audit_folder.py [--sizes 20000 100000] [--rounds 2] [--ref main] [--tmp DIR]
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

sys.path.insert(0, str(Path(__file__).resolve().parent))
from sidebyside import ROOT, aim, export, load  # noqa: E402

TARGET = 1_000_000
AIM_SECONDS = 600.0  # 10 minutes on 2 cores
AIM_GIB = 4.0
AIM_SPEEDUP = 1.5  # 2 workers over 1 on an idle 2-core machine (common practice, no source)


def spec(n: int) -> dict:
    test = n // 10
    return {"seed": 7, "canvas": {"width": 96, "height": 96, "mode": "rgb"},
            "objects": {"kind": "polyomino", "cells": 5, "cell_px": 5, "colour": [220, 80, 40]},
            "background": {"kind": "solid", "value": 0.5},
            "axes": {"x": {"range": [16, 80]}, "y": {"range": [16, 80]},
                     "scale": {"range": [0.75, 1.5], "dist": "log"}, "angle": {"range": [0, 360]},
                     "hue": {"range": [0, 360]}},
            "splits": {"train": {"region": {"x": [16, 40]}, "count": n - 2 * test},
                       "test": {"region": {"x": [56, 80]}, "count": test},
                       "iid": {"region": {"x": [16, 40]}, "count": test}}}


def env(tree: Path) -> dict:
    return dict(os.environ, PYTHONPATH=str(tree), MPLBACKEND="Agg")


def make(n: int, tmp: Path) -> Path:
    out = tmp / f"ds-{n}"
    if (out / "dataset.json").exists():
        return out
    spec_file = tmp / f"spec-{n}.yaml"
    spec_file.write_text(yaml.safe_dump(spec(n), sort_keys=False))
    subprocess.run([sys.executable, "-m", "augsplit.cli", "generate", str(spec_file), "--out", str(out),
                    "--store", "parquet", "--workers", "2", "--quiet"], check=True, env=env(ROOT),
                   stderr=subprocess.DEVNULL)
    return out


def audit(root: Path, tmp: Path, workers: int | None, tree: Path) -> tuple[float, float]:
    """(seconds, peak GiB) of one `augsplit audit` in a fresh process (workers None: no option)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    args = [sys.executable, "-m", "augsplit.cli", "audit", str(root), "--quiet", "--out", str(tmp / "report")]
    args += [] if workers is None else ["--workers", str(workers)]
    t = time.perf_counter()
    r = subprocess.run(args, env=env(tree), capture_output=True, text=True)
    dt = time.perf_counter() - t
    if r.returncode not in (0, 1):
        raise RuntimeError(r.stderr[-2000:])
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    # ru_maxrss of children is the largest child so far: only a new maximum is attributable
    return dt, (peak if peak > before else float("nan")) / 1024 ** 2


def measure(root: Path, tmp: Path, rounds: int, ref_tree: Path | None) -> dict:
    runs = {"w1": (1, ROOT), "w2": (2, ROOT)}
    if ref_tree is not None:
        runs["ref"] = (None, ref_tree)
    best: dict = {k: (float("inf"), 0.0) for k in runs}
    for r in range(rounds):
        order = list(runs) if r % 2 == 0 else list(runs)[::-1]  # interleaved, alternating order
        for k in order:
            w, tree = runs[k]
            dt, gib = audit(root, tmp, w, tree)
            print(f"  round {r + 1} {k}: {dt:.1f} s, peak {gib:.2f} GiB ({load()})", flush=True)
            best[k] = (min(best[k][0], dt), max(best[k][1], gib if gib == gib else 0.0))
    return best


def child_peak(root: Path, workers: int) -> float:
    """Peak memory of one audit alone: the driver's ru_maxrss plus `workers` times the largest
    worker's (an upper bound: forked workers share the driver's pages)."""
    code = ("import resource, sys; from augsplit.cli import main; main(sys.argv[1:]); "
            "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)")
    r = subprocess.run([sys.executable, "-c", code, "audit", str(root), "--quiet", "--workers", str(workers),
                        "--out", str(root.parent / "report-peak")], env=env(ROOT), capture_output=True, text=True)
    own, kids = (int(v) for v in r.stdout.strip().splitlines()[-1].split())
    return (own + workers * kids) / 1024 ** 2


def at_target(sizes: list[int], values: list[float]) -> tuple[float, str]:
    if sizes[-1] == TARGET:
        return values[-1], "measured"
    (n0, v0), (n1, v1) = (sizes[-2], values[-2]), (sizes[-1], values[-1])
    return v1 + (v1 - v0) * (TARGET - n1) / (n1 - n0), f"extrapolated linearly from {n0:,} and {n1:,}"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[20_000, 100_000])
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--ref", default=None, help="also time the audit at this git ref (single process)")
    ap.add_argument("--tmp", default=None)
    a = ap.parse_args()
    tmp = Path(a.tmp or tempfile.mkdtemp(prefix="bench-audit-folder-"))
    tmp.mkdir(parents=True, exist_ok=True)
    ref_tree = export(a.ref) if a.ref else None
    sizes = sorted(a.sizes)
    t2, t1, mem = [], [], []
    for n in sizes:
        root = make(n, tmp)
        print(f"{n:,} images (96x96, --store parquet) in {root}; {load()}", flush=True)
        best = measure(root, tmp, a.rounds, ref_tree)
        peak = child_peak(root, 2)
        t1.append(best["w1"][0]); t2.append(best["w2"][0]); mem.append(peak)
        line = (f"{n:,} images: 1 worker {best['w1'][0]:.1f} s, 2 workers {best['w2'][0]:.1f} s "
                f"({best['w1'][0] / best['w2'][0]:.2f}x), peak {peak:.2f} GiB (driver + 2 x largest worker)")
        if ref_tree is not None:
            line += f"; {a.ref} (one process) {best['ref'][0]:.1f} s ({best['ref'][0] / best['w1'][0]:.2f}x of 1 worker)"
        print(line, flush=True)
    secs, how = at_target(sizes, t2) if len(sizes) > 1 or sizes[-1] == TARGET else (float("nan"), "not measurable")
    gib, how_mem = at_target(sizes, mem) if len(sizes) > 1 or sizes[-1] == TARGET else (float("nan"), "")
    aim(f"audit of a 1,000,000-image folder on 2 workers < {AIM_SECONDS:.0f} s", f"{secs:.0f} s ({how})",
        secs < AIM_SECONDS)
    aim(f"audit of a 1,000,000-image folder: peak memory < {AIM_GIB:.0f} GiB", f"{gib:.2f} GiB ({how_mem})",
        gib < AIM_GIB)
    aim(f"audit, 2 workers over 1 at {sizes[-1]:,} images >= {AIM_SPEEDUP}x", f"{t1[-1] / t2[-1]:.2f}x",
        t1[-1] / t2[-1] >= AIM_SPEEDUP, needs_idle=True)


if __name__ == "__main__":
    main()
