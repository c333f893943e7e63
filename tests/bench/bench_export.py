"""Benchmark: exporting a dataset against reading its images once (the floor of any export).

For a dataset stored as files and one stored as nothing (re-rendered), the wall time of each
export format side by side with a plain pass of `image_of` over every row, as ratios. Aim: an
export of stored images costs a few reads (encoded bytes are copied, never re-encoded); masks
(coco, yolo-seg) add one footprint warp per object.

Run: python tests/bench/bench_export.py [--quick]. Wall time (exports write files), best of
the repeats, contenders in turn within each repeat.
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

from augsplit.dataset import image_of, open_dataset, read_rows
from augsplit.formats.export import FORMATS, export
from augsplit.generate import Options, generate

SPEC = """seed: 5
canvas: {width: 64, height: 64, mode: rgb}
objects: {kind: polyomino, cells: 5, cell_px: 4}
background: {kind: uniform_noise, lo: 0.1, hi: 0.6}
axes:
  x: {range: [0, 64]}
  y: {range: [0, 64]}
  angle: {range: [0, 360]}
splits:
  train: {region: {x: [0, 26]}, per_class: PER}
  test: {region: {x: [38, 64]}, per_class: PER_TEST}
"""


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    a = ap.parse_args()
    per, repeats = (20, 1) if a.quick else (200, 3)
    base = Path(tempfile.mkdtemp(prefix="bench-export-"))
    try:
        spec = base / "spec.yaml"
        spec.write_text(SPEC.replace("PER_TEST", str(per // 4)).replace("PER", str(per)))
        for store in ("files", "none"):
            ds = base / store
            generate(spec, ds, Options(store=store, progress=False))
            folder = open_dataset(ds)
            rows = read_rows(folder).to_dict("records")
            best = {}
            for r in range(repeats):
                t = time.perf_counter()
                for row in rows:
                    image_of(folder, row)
                best["read"] = min(best.get("read", 1e9), time.perf_counter() - t)
                for to in FORMATS:
                    out = base / f"{store}-{to}-{r}"
                    t = time.perf_counter()
                    export(ds, out, to, per_shard=500)
                    best[to] = min(best.get(to, 1e9), time.perf_counter() - t)
                    shutil.rmtree(out)
            print(f"store {store}: {len(rows)} images, read pass {best['read']:.3f} s "
                  f"({len(rows) / best['read']:.0f} img/s)")
            for to in FORMATS:
                print(f"  {to:<9} {best[to]:.3f} s  {len(rows) / best[to]:7.0f} img/s  x{best[to] / best['read']:.2f} of the read pass")
    finally:
        shutil.rmtree(base)


if __name__ == "__main__":
    main()
