"""Benchmark of the audit checks on a synthetic one-million-row manifest.

800k train and 200k test rows, five axes (x, y, scale, angle, hue), ten classes, bbox
footprints (a few with masks) and given 64-bit hashes with planted near-duplicates. Each
check is timed on all rows against the straightforward pandas/numpy way on a 10k-row sample,
scaled up by its complexity (pairwise: x (N/n)^2; per-row loops: x N/n). Hashing is
reported in images per second against imagehash. Peak memory from resource.getrusage.

    python tests/bench/bench_audit.py [--rows 1000000] [--gigabyte]
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

from augsplit.audit import run_audit
from augsplit.audit.footprint import check_footprint
from augsplit.audit.nearest_hash import check_near_duplicates
from augsplit.audit.phash import phash_batch
from augsplit.audit.proximity import AxisScale, check_proximity

sys.path.insert(0, str(Path(__file__).resolve().parent))
from sidebyside import aim  # noqa: E402

HW = (96, 96)
SCALES = [AxisScale("x", 0, 96), AxisScale("y", 0, 96), AxisScale("scale", 0.75, 1.5, log=True),
          AxisScale("angle", 0, 360, True), AxisScale("hue", 0, 360, True)]
RADIUS = 8


def manifest(n: int, seed: int = 0) -> pd.DataFrame:
    """Train in the left 40 % of the canvas, test in the right 35 %; 10 classes."""
    rng = np.random.default_rng(seed)
    n_train = int(n * 0.8)
    split = np.where(np.arange(n) < n_train, "train", "test")
    x = np.where(split == "train", rng.uniform(8, 38, n), rng.uniform(62, 88, n))
    df = pd.DataFrame({
        "image_id": [f"r{i}" for i in range(n)], "split": split,
        "class_name": np.array([f"c{k}" for k in range(10)])[rng.integers(0, 10, n)],
        "x": x, "y": rng.uniform(8, 88, n), "scale": np.exp(rng.uniform(np.log(0.75), np.log(1.5), n)),
        "angle": rng.uniform(0, 360, n), "hue": rng.uniform(0, 360, n)})
    half = np.round(5 * df["scale"].to_numpy())
    df["bbox_x0"] = (df["x"] - half).astype(np.int64); df["bbox_x1"] = (df["x"] + half).astype(np.int64)
    df["bbox_y0"] = (df["y"] - half).astype(np.int64); df["bbox_y1"] = (df["y"] + half).astype(np.int64)
    h = rng.integers(0, 2**64, n, dtype=np.uint64)
    test_rows = np.flatnonzero(split == "test")
    plant = test_rows[:200]  # near-copies of train images, 0-6 bits away
    flips = rng.integers(0, 64, (200, 6)).astype(np.uint64)
    noise = np.zeros(200, np.uint64)
    for j in range(6):
        noise ^= np.where(rng.random(200) < 0.5, np.uint64(1) << flips[:, j], np.uint64(0))
    h[plant] = h[rng.integers(0, n_train, 200)] ^ noise
    df["phash"] = h
    return df


def timed(fn, *a, **kw):
    t = time.perf_counter(); out = fn(*a, **kw)
    return out, time.perf_counter() - t


# ---- straightforward baselines (what a user would write) ----------------------------------

def baseline_proximity(train, test, ctr, cte):
    """Brute force: every test row against every train row of its class, numpy broadcasting."""
    a = np.column_stack([s.normalise(train[:, i]) for i, s in enumerate(SCALES)])
    b = np.column_stack([s.normalise(test[:, i]) for i, s in enumerate(SCALES)])
    per = np.array([s.periodic for s in SCALES])
    out = np.empty(len(b))
    for j in range(len(b)):
        d = np.abs(a[ctr == cte[j]] - b[j])
        d[:, per] = np.minimum(d[:, per], 1 - d[:, per])
        out[j] = np.sqrt((d ** 2).sum(1)).min()
    return out


def baseline_footprint(df_train, df_test):
    """Paint every train box into a per-class canvas, then look at each test box's pixels."""
    cov = {}
    for r in df_train.itertuples(index=False):
        m = cov.setdefault(r.class_name, np.zeros(HW, bool))
        m[max(r.bbox_y0, 0):r.bbox_y1, max(r.bbox_x0, 0):r.bbox_x1] = True
    hits = []
    for r in df_test.itertuples(index=False):
        m = cov.get(r.class_name)
        hits.append(m is not None and m[max(r.bbox_y0, 0):r.bbox_y1, max(r.bbox_x0, 0):r.bbox_x1].any())
    return np.array(hits)


def baseline_hashes(train, test):
    """All pairs: XOR and popcount of each test hash against every train hash."""
    return np.array([np.bitwise_count(train ^ q).min() for q in test])


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--sample", type=int, default=10_000)
    ap.add_argument("--gigabyte", action="store_true", help="also audit a ~1 GB Parquet file with embedded PNGs")
    ap.add_argument("--tmp", default=None, help="folder for the 1 GB file (default: the system's)")
    args = ap.parse_args()
    N, n = args.rows, args.sample
    df, t_make = timed(manifest, N)
    tr, te = df[df.split == "train"], df[df.split == "test"]
    cols = [s.name for s in SCALES]
    bcols = ["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]
    print(f"manifest: {len(tr):,} train + {len(te):,} test rows, made in {t_make:.1f} s")

    # masks for a few test rows (a disc inside the bbox) and a few train rows
    mask_rows_te = np.arange(0, 2000, 10); mask_rows_tr = np.arange(0, 2000, 10)
    te_b, tr_b = te[bcols].to_numpy(), tr[bcols].to_numpy()

    def mask_loader(row):
        b = tr_b[row] if row < len(tr) else te_b[row - len(tr)]
        h, w = int(b[3] - b[1]), int(b[2] - b[0])
        yy, xx = np.mgrid[:h, :w]
        return (yy - h / 2 + 0.5) ** 2 + (xx - w / 2 + 0.5) ** 2 <= (min(h, w) / 2) ** 2

    ours = {}
    res, ours["parameter proximity"] = timed(check_proximity, tr[cols].to_numpy(), te[cols].to_numpy(), SCALES, 0.05,
                                             tr["class_name"].to_numpy(), te["class_name"].to_numpy())
    assert res.verdict == "pass"
    res, ours["footprint overlap"] = timed(check_footprint, tr_b, te_b, HW, tr["class_name"].to_numpy(),
                                           te["class_name"].to_numpy(), mask_loader, np.arange(len(tr)),
                                           np.arange(len(tr), N), mask_rows_tr, mask_rows_te, True)
    assert res.numbers["n_overlapping"] == 0
    res, ours["near-duplicate search"] = timed(check_near_duplicates, tr["phash"].to_numpy(), te["phash"].to_numpy(), RADIUS)
    found = res.numbers["n_near_duplicates"]

    # baselines on a sample of n rows (same 80/20 split), scaled to the full size
    s = manifest(n, seed=1)
    st, ss = s[s.split == "train"], s[s.split == "test"]
    base, scale = {}, {}
    _, base["parameter proximity"] = timed(baseline_proximity, st[cols].to_numpy(), ss[cols].to_numpy(),
                                           st["class_name"].to_numpy(), ss["class_name"].to_numpy())
    scale["parameter proximity"] = (N / n) ** 2
    _, base["footprint overlap"] = timed(baseline_footprint, st, ss)
    scale["footprint overlap"] = N / n
    _, base["near-duplicate search"] = timed(baseline_hashes, st["phash"].to_numpy(), ss["phash"].to_numpy())
    scale["near-duplicate search"] = (N / n) ** 2

    print(f"\n{'check':24s} {'ours, all rows':>15s} {'baseline, ' + format(n, ',') + ' rows':>22s} "
          f"{'baseline scaled':>16s} {'speed-up':>9s}")
    for k in ours:
        scaled = base[k] * scale[k]
        print(f"{k:24s} {ours[k]:13.2f} s {base[k]:20.3f} s {scaled:14.0f} s {scaled / ours[k]:8.0f}x")
    total = sum(ours.values())
    print(f"{'three checks together':24s} {total:13.2f} s   (aim: < 60 s)")
    aim("proximity, footprint and near-duplicate checks on 1,000,000 manifest rows < 60 s", f"{total:.1f} s",
        total < 60)
    print(f"near-duplicates found: {found} (200 planted within 0-6 bits, radius {RADIUS})")

    # end to end: run_audit on the whole table (all checks, hash column given)
    res, t_run = timed(run_audit, df, {s.name: (s.lo, s.hi, s.periodic, "log" if s.log else "linear") for s in SCALES},
                       margin=0.05, thresholds={"footprint_disjoint": True}, canvas_hw=HW)
    print(f"run_audit, every check, {N:,} rows: {t_run:.2f} s, verdict {res.verdict} "
          f"({', '.join(c.name for c in res.failed()) or 'none failed'})")

    # hashing throughput: ours in batches vs imagehash per image (96x96 RGB)
    import imagehash
    from PIL import Image
    rng = np.random.default_rng(2)
    imgs = rng.integers(0, 256, (4096, 96, 96, 3), dtype=np.uint8)
    _, t_ours = timed(phash_batch, imgs)
    k = 500
    _, t_ref = timed(lambda: [imagehash.phash(Image.fromarray(i)) for i in imgs[:k]])
    print(f"\nhashing 96x96 RGB: ours {len(imgs) / t_ours:,.0f} images/s, imagehash {k / t_ref:,.0f} images/s "
          f"({(len(imgs) / t_ours) / (k / t_ref):.1f}x), bit-identical (see tests/test_audit_phash.py)")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024 ** 2  # KiB on Linux
    print(f"peak memory (ru_maxrss): {peak:.2f} GiB (aim: < 4 GiB)")
    aim("the same: peak memory < 4 GiB", f"{peak:.2f} GiB", peak < 4)
    if args.gigabyte:
        gigabyte_table(args.tmp)


def gigabyte_table(tmp: str):
    """A ~1 GB Parquet manifest with embedded PNGs, audited straight from the file: the
    image column is streamed by row group, so memory stays far below the file size."""
    import os
    import tempfile

    import cv2
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(3)
    n = 38_000  # noise PNGs of 96x96x3 are ~27.7 kB each
    df = manifest(n, seed=3).drop(columns="phash")
    path = os.path.join(tempfile.mkdtemp(dir=tmp), "big.parquet")
    writer = None
    t0 = time.perf_counter()
    for s in range(0, n, 2000):
        part = df.iloc[s : s + 2000].copy()
        part["image_bytes"] = [cv2.imencode(".png", rng.integers(0, 256, (96, 96, 3), dtype=np.uint8))[1].tobytes()
                               for _ in range(len(part))]
        t = pa.Table.from_pandas(part, preserve_index=False)
        writer = writer or pq.ParquetWriter(path, t.schema)
        writer.write_table(t)
    writer.close()
    size = os.path.getsize(path) / 1e9
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024 ** 2
    res, t_run = timed(run_audit, path, {s.name: (s.lo, s.hi, s.periodic) for s in SCALES}, margin=0.05, canvas_hw=HW)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024 ** 2
    print(f"\n1 GB table: {size:.2f} GB Parquet ({n:,} rows with PNGs, written in {time.perf_counter() - t0 - t_run:.0f} s); "
          f"run_audit from the file {t_run:.1f} s ({n / t_run:,.0f} rows/s incl. decoding and hashing), "
          f"verdict {res.verdict}; peak memory {peak:.2f} GiB (before: {before:.2f} GiB)")
    os.remove(path)


if __name__ == "__main__":
    main()
