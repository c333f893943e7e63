"""Benchmark of `augsplit audit DIR` on a real dataset folder: 96x96 RGB images stored with
`--store parquet` (made with `augsplit generate --workers 2`), three splits (train 80 %, a
held-out test 10 %, an i.i.d. split 10 %: two audited pairs sharing the train split).

For each size, `augsplit audit DIR --quiet` runs in a fresh process at 1 and at 2 workers (and,
with --ref, the audit at a git ref, single process), in interleaved rounds; the best wall time
of the rounds is kept. Peak memory is the largest sum of PSS over the run's processes (driver
and workers), sampled in one more run at 2 workers. The 1,000,000-image figures come
from --sizes: the largest size measured when it is 1,000,000, else a straight line through the
two largest sizes (the work is linear in rows: hashing and masks per row, checks by sorting and
counting), extended to 1,000,000; the report says which.

    python tests/bench/bench_audit_folder.py [--sizes 20000 100000] [--rounds 2] [--ref main] [--tmp DIR]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path


sys.path.insert(0, str(Path(__file__).resolve().parent))
from sidebyside import ROOT, aim, export, load, make_dataset, scratch  # noqa: E402

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
    return make_dataset(spec(n), tmp / f"ds-{n}", "parquet")


def audit(root: Path, tmp: Path, workers: int | None, tree: Path) -> float:
    """Seconds of one `augsplit audit` in a fresh process (workers None: no option)."""
    args = [sys.executable, "-m", "augsplit.cli", "audit", str(root), "--quiet", "--out", str(tmp / "report")]
    args += [] if workers is None else ["--workers", str(workers)]
    t = time.perf_counter()
    # run from the scratch folder: `python -m` puts the working directory first on the path
    r = subprocess.run(args, env=env(tree), capture_output=True, text=True, cwd=tmp)
    dt = time.perf_counter() - t
    if r.returncode not in (0, 1):
        raise RuntimeError(r.stderr[-2000:])
    return dt


def measure(root: Path, tmp: Path, rounds: int, ref_tree: Path | None) -> dict:
    runs = {"w1": (1, ROOT), "w2": (2, ROOT)}
    if ref_tree is not None:
        runs["ref"] = (None, ref_tree)
    best = {k: float("inf") for k in runs}
    for r in range(rounds):
        order = list(runs) if r % 2 == 0 else list(runs)[::-1]  # interleaved, alternating order
        for k in order:
            w, tree = runs[k]
            dt = audit(root, tmp, w, tree)
            print(f"  round {r + 1} {k}: {dt:.1f} s ({load()})", flush=True)
            best[k] = min(best[k], dt)
    return best


def _tree(pid: int) -> list[int]:
    """pid and its descendants (from /proc)."""
    parent = {}
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                parent[int(d)] = int(Path(f"/proc/{d}/stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                pass
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo += [c for c, pp in parent.items() if pp == p]
    return out


def _pss_kib(pid: int) -> int:
    try:
        for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
            if line.startswith("Pss:"):
                return int(line.split()[1])
    except OSError:
        pass
    return 0


def child_peak(root: Path, workers: int, every: float = 0.2) -> float:
    """Peak memory (GiB) of one audit: the largest sum over its process tree (driver and
    workers) of proportional set sizes, sampled every `every` s. PSS counts a page shared by
    forked workers once in all, so the sum is the memory the run takes from the machine."""
    args = [sys.executable, "-m", "augsplit.cli", "audit", str(root), "--quiet", "--workers", str(workers),
            "--out", str(root.parent / "report-peak")]
    proc = subprocess.Popen(args, env=env(ROOT), cwd=root.parent, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    peak = 0
    while proc.poll() is None:
        peak = max(peak, sum(_pss_kib(p) for p in _tree(proc.pid)))
        time.sleep(every)
    return peak / 1024 ** 2


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
    tmp = scratch(a.tmp, "bench-audit-folder-")
    ref_tree = export(a.ref) if a.ref else None
    sizes = sorted(a.sizes)
    t2, t1, mem = [], [], []
    for n in sizes:
        root = make(n, tmp)
        print(f"{n:,} images (96x96, --store parquet) in {root}; {load()}", flush=True)
        best = measure(root, tmp, a.rounds, ref_tree)
        peak = child_peak(root, 2)
        t1.append(best["w1"]); t2.append(best["w2"]); mem.append(peak)
        line = (f"{n:,} images: 1 worker {best['w1']:.1f} s, 2 workers {best['w2']:.1f} s "
                f"({best['w1'] / best['w2']:.2f}x), peak {peak:.2f} GiB (PSS of driver and workers, 2 workers)")
        if ref_tree is not None:
            line += f"; {a.ref} (one process) {best['ref']:.1f} s ({best['ref'] / best['w1']:.2f}x the time of 1 worker)"
        print(line, flush=True)
    if len(sizes) > 1 or sizes[-1] == TARGET:
        secs, how = at_target(sizes, t2)
        gib, how_mem = at_target(sizes, mem)
        aim(f"audit of a 1,000,000-image folder on 2 workers < {AIM_SECONDS:.0f} s", f"{secs:.0f} s ({how})",
            secs < AIM_SECONDS)
        aim(f"audit of a 1,000,000-image folder: peak memory < {AIM_GIB:.0f} GiB", f"{gib:.2f} GiB ({how_mem})",
            gib < AIM_GIB)
    else:
        print("the 1,000,000-image aims need that size or two sizes to extend a line through")
    aim(f"audit, 2 workers over 1 at {sizes[-1]:,} images >= {AIM_SPEEDUP}x", f"{t1[-1] / t2[-1]:.2f}x",
        t1[-1] / t2[-1] >= AIM_SPEEDUP, needs_idle=True)


if __name__ == "__main__":
    main()
