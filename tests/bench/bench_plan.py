"""Benchmark of `augsplit plan`: time and peak memory of footprint proofs as the canvas grows,
and of grids of 40 x 40 cells, against the aims (under 5 s and 1 GiB up to 1024 px and for
40 x 40 grids; under 30 s and 2 GiB at 2048 px).

Each plan runs in a fresh Python (time from before `import augsplit` to the plan's text;
peak memory is that process's maximum resident set, resource.getrusage). With `--baseline
REF` the same specs are planned by the package as it was at git ref REF, side by side, and
the two plans' JSON (verdicts and every proof number) must be equal.

Specs (all proved, by the stage named):
  translation N  tetrominoes 4N/64 px across turning freely at scales 0.9-1.1; train a band
                 in the middle of x, test both sides 4.5N/64 px away: the disc bound refuses,
                 the rasterised envelopes (and at 2048 px an exact search) prove it.
  grid 40x40     a checkerboard of 40 x 40 position cells and its complement (parameters).
  grid 40x40 fp  a checkerboard of 40 x 40 cells in the top half of a 512 px canvas and a
                 band below it, trominoes turning 15 degrees (footprints).

    python tests/bench/bench_plan.py [--sizes 256,512,1024,2048] [--baseline REF] [--repeat 1]
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import tempfile
import time
from pathlib import Path

T_START = time.perf_counter()
HERE = Path(__file__).resolve()
sys.path.insert(0, str(HERE.parent))

from sidebyside import aim, child, export, load, verdict  # noqa: E402


def translation(n: int) -> dict:
    k = n / 64
    a, b = round(0.3 * n), round(0.7 * n)
    return {"seed": 5, "canvas": {"width": n, "height": n, "mode": "gray"},
            "objects": {"kind": "polyomino", "cells": 4, "cell_px": max(1, round(k))},
            "axes": {"x": {"range": [0, n]}, "y": {"range": [0, n]}, "angle": {"range": [0, 360]},
                     "scale": {"range": [0.9, 1.1], "dist": "log"}},
            "splits": {"train": {"region": {"x": [a, b]}, "per_class": 4},
                       "test": {"region": {"x": [[0, a - 4.5 * k], [b + 4.5 * k, n]]}, "per_class": 2}},
            "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}]}


def grid() -> dict:
    return {"seed": 31, "canvas": {"width": 90, "height": 90, "mode": "rgb"},
            "objects": {"kind": "polyomino", "cells": 4, "cell_px": 4},
            "axes": {"x": {"range": [0, 90]}, "y": {"range": [0, 90]}, "hue": {"range": [0, 360]}},
            "splits": {"train": {"region": {"cells": {"grid": {"x": 40, "y": 40}, "pick": "checkerboard"}}, "per_class": 90},
                       "test": {"region": {"cells": {"grid": {"x": 40, "y": 40}, "pick": "checkerboard_odd"}},
                                "per_class": 30}},
            "guarantees": [{"disjoint": "parameters", "between": ["train", "test"]}]}


def grid_footprint() -> dict:
    n = 512
    return {"seed": 3, "canvas": {"width": n, "height": n, "mode": "gray"},
            "objects": {"kind": "polyomino", "cells": 3, "cell_px": 4},
            "axes": {"x": {"range": [0, n]}, "y": {"range": [0, n]}, "angle": {"range": [-15, 15]}},
            "splits": {"train": {"region": {"y": [0, n / 2], "cells": {"grid": {"x": 40, "y": 40}, "pick": "checkerboard"}},
                                 "per_class": 4},
                       "test": {"region": {"y": [n / 2 + 10, n]}, "per_class": 2}},
            "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}]}


def measure(spec_path: str) -> None:
    """Child: plan one spec, print time, peak memory and the plan's JSON."""
    from augsplit.build import open_mapping
    from augsplit.plan.describe import plan_data, plan_text

    spec = json.loads(Path(spec_path).read_text())
    plan = open_mapping(spec, strict=False).plan
    plan_text(plan)
    data = plan_data(plan)
    seconds = time.perf_counter() - T_START
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    cpu = resource.getrusage(resource.RUSAGE_SELF)
    print(json.dumps({"seconds": seconds, "cpu": cpu.ru_utime + cpu.ru_stime, "peak": peak, "plan": data,
                      "verdicts": [(v.status, v.numbers.get("stage")) for v in plan.verdicts]}, default=str))


def run(name: str, spec: dict, trees: dict, repeat: int, tmp: Path) -> dict:
    path = tmp / f"{name.replace(' ', '_')}.json"
    path.write_text(json.dumps(spec))
    out = {}
    for label, tree in trees.items():
        best = None
        for _ in range(repeat):
            r = child(HERE, ["--child", str(path)], tree)
            if best is None or r["seconds"] < best["seconds"]:
                best = r
        out[label] = best
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="256,512,1024,2048", help="canvas sizes of the translation spec")
    ap.add_argument("--baseline", default=None, help="git ref to plan the same specs with, side by side")
    ap.add_argument("--repeat", type=int, default=1, help="runs per figure (the fastest is kept)")
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child:
        measure(a.child)
        return
    trees = {"now": None}
    if a.baseline:
        trees[a.baseline] = export(a.baseline)
    print(f"== augsplit plan: time and peak memory ({load()} at start)")
    cases = [(f"translation {n}", translation(n), 5.0 if n <= 1024 else 30.0, 2**30 if n <= 1024 else 2 * 2**30)
             for n in (int(s) for s in a.sizes.split(","))]
    cases += [("grid 40x40", grid(), 5.0, 2**30), ("grid 40x40 fp", grid_footprint(), 5.0, 2**30)]
    with tempfile.TemporaryDirectory() as tmp:
        for name, spec, t_aim, m_aim in cases:
            res = run(name, spec, trees, a.repeat, Path(tmp))
            now = res["now"]
            ok = now["seconds"] < t_aim and now["peak"] < m_aim
            line = (f"{name:16s} {now['seconds']:7.2f} s ({now['cpu']:6.2f} s CPU) {now['peak'] / 2**20:7.0f} MiB   "
                    f"aim < {t_aim:g} s, < {m_aim / 2**30:g} GiB: {verdict(ok)}   {now['verdicts']}")
            if a.baseline:
                base = res[a.baseline]
                same = "same plan" if base["plan"] == now["plan"] else "PLANS DIFFER"
                line += (f"\n{'':16s} {a.baseline}: {base['seconds']:7.2f} s ({base['cpu']:6.2f} s CPU) "
                         f"{base['peak'] / 2**20:7.0f} MiB   speed-up {base['seconds'] / now['seconds']:5.1f}x, "
                         f"memory {base['peak'] / now['peak']:4.1f}x less; {same}")
            print(line, flush=True)
            aim(f"plan {name}: < {t_aim:g} s, < {m_aim / 2**30:g} GiB",
                f"{now['seconds']:.1f} s, {now['peak'] / 2**20:.0f} MiB", ok)
    print(f"({load()} at the end)")


if __name__ == "__main__":
    main()
