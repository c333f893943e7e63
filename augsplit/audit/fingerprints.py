"""Perceptual and content hashes of every row (computed once, on first need), the images
behind them, and how the near-duplicate check judges its candidates (audit/lookalike.py)."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import AugsplitError, DatasetError
from . import lookalike
from .inputs import TableSource, check_files_exist, decode_image, read_image
from .nearest_hash import hamming
from .phash import fingerprint_images
from .result import PASS, CheckResult
from .thresholds import Thresholds


class _Fingerprints:
    """Perceptual and content hashes of every row, computed once, on first need."""

    def __init__(self, src: TableSource, df: pd.DataFrame, image_loader, th: Thresholds, progress: bool, rows: np.ndarray,
                 coefficients: bool = False, computed=None):
        self.src, self.df, self.loader, self.th, self.progress, self.rows = src, df, image_loader, th, progress, rows
        self.computed = computed  # hashes, sha and coef of every row, made before (audit/parallel.py)
        self._done = False
        self.hashes = self.sha = self.coef = None
        self.want_coef = coefficients
        self.reason = ""
        self.kind = "none"
        has_file = np.zeros(len(df), bool)
        if "file" in df:
            f = df["file"].astype(str)
            has_file = ((f != "") & (f != "None") & (f != "nan") & (f != "<NA>")).to_numpy()
        self.has_file = has_file
        if image_loader is not None:
            self.kind = "loader"
        elif th.hash_column in df:
            self.kind = "hash_column"  # hashes given: images are not needed
        elif has_file[rows].all() and rows.any():
            self.kind = "file"
        elif "image_bytes" in src.columns:
            self.kind = "bytes"  # embedded images; rows that list a file are read from it
        elif has_file.any():
            self.kind = "file"
        if self.kind in ("file", "bytes") and has_file.any():
            check_files_exist(df["file"].where(has_file, ""), src.root, np.arange(len(df)))  # fail early

    def get(self):
        if not self._done:
            self._done = True
            self._compute()
        return self.hashes, self.sha, self.reason

    def _compute(self):
        df, th = self.df, self.th
        need = self.rows
        sha = None
        if "sha256" in df:
            s = df["sha256"]
            if not s[need].isna().any() and not (s[need].astype(str) == "").any():
                sha = s.astype(str).to_numpy(object)
        if th.hash_column in df:
            self.hashes = _parse_hashes(df[th.hash_column], f"column '{th.hash_column}'")
            self.sha = sha
            return
        if self.kind == "none":
            self.reason = "no images: give an image loader, a file or image_bytes column, or a phash column"
            return
        if self.computed is not None:  # pixels read are the evidence, as below
            c = self.computed
            self.hashes, self.sha, self.coef = c.hashes, c.sha, (c.coef if self.want_coef else None)
            return
        rows = np.flatnonzero(need)
        hashes = np.zeros(len(df), np.uint64)
        computed_sha = np.empty(len(df), dtype=object)
        from ..progress import bar as tqdm

        out = fingerprint_images(tqdm(self._images(rows), total=len(rows), unit="img", desc="hashing",
                                      disable=not self.progress), coefficients=self.want_coef)
        hashes[rows] = out[0]
        computed_sha[rows] = out[1]
        if self.want_coef:  # directions of the DCT blocks (float16), to find what a changed image copies
            self.coef = np.zeros((len(df), 63), np.float16)
            self.coef[rows] = lookalike.ac_directions(out[2])
        self.hashes = hashes
        # pixels read are the evidence: a file copied over another after generation keeps its
        # old manifest sha256, so the column is used only when no image is read
        self.sha = computed_sha

    def _images(self, rows):
        """Images of the given rows, in order (streamed from Parquet when embedded). Files and
        bytes are decoded on a few threads: OpenCV releases the GIL while decoding."""
        if self.kind == "loader":
            for r in rows:
                img = self.loader(int(r))
                if img is None:
                    raise DatasetError("image loader returned no image", where=f"row {int(r)}")
                yield np.asarray(img)
            return
        from ..dataset.images import Box

        box = Box(self.src.root or Path("."))  # one for the run: the folder is resolved once
        names = self.df["file"].astype(str).to_numpy() if "file" in self.df else None

        def from_file(r):
            if not self.has_file[r]:
                raise DatasetError("row has neither image bytes nor an image file", where=f"row {int(r)}")
            return read_image(box, names[r])

        if self.kind == "file":
            yield from _ordered_map(from_file, rows)
        elif self.kind == "bytes":
            def jobs():
                wanted = np.zeros(len(self.df), bool); wanted[rows] = True
                pos = 0
                for batch in self.src.iter_batches(["image_bytes"], batch_rows=1024):
                    for k, data in enumerate(batch["image_bytes"].tolist()):
                        if wanted[pos + k]:
                            yield pos + k, data
                    pos += len(batch)
            # a cell without bytes (None, or NaN from a CSV) falls back to the row's file
            yield from _ordered_map(lambda job: decode_image(job[1], f"row {job[0]}")
                                    if isinstance(job[1], (bytes, bytearray, memoryview)) else from_file(job[0]), jobs())

    def unchanged(self) -> np.ndarray:
        """Per row: the pixels read are those the manifest's sha256 recorded when the row was
        rendered (False where either is missing)."""
        out = np.zeros(len(self.df), bool)
        if self.sha is not None and "sha256" in self.df and self.kind != "hash_column":
            rec = self.df["sha256"].astype(str).to_numpy(object)
            out = np.array([a is not None and a == b for a, b in zip(self.sha, rec)], bool)
        return out

    def fetch(self, rows: list[int]) -> dict[int, np.ndarray]:
        """A few rows' images (for thumbnails); empty when images are not available."""
        rows = sorted(set(int(r) for r in rows if r is not None and r >= 0))
        if not rows or self.kind in ("none", "hash_column"):
            return {}
        return dict(zip(rows, self._images(np.array(rows, np.int64))))


def _ordered_map(fn, items, workers: int = 2, window: int = 64):
    """fn over items on a few threads, results in input order, at most `window` in flight."""
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=workers) as pool:
        pending: deque = deque()
        for item in items:
            pending.append(pool.submit(fn, item))
            if len(pending) >= window:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def _parse_hashes(col: pd.Series, where: str) -> np.ndarray:
    if col.isna().any():
        raise DatasetError(f"{int(col.isna().sum())} missing hashes", where=where)
    if pd.api.types.is_integer_dtype(col):
        return col.to_numpy().astype(np.uint64)
    try:
        return np.array([int(str(v), 16) for v in col], dtype=np.uint64)
    except ValueError as exc:
        raise DatasetError(f"hashes must be 64-bit integers or hexadecimal strings ({exc})", where=where) from None


def _attach_thumbnails(checks: list[CheckResult], fp: _Fingerprints, th: Thresholds) -> list[CheckResult]:
    """Worst offenders' images beside their nearest train images, for the HTML report."""
    if th.thumbnails <= 0 or fp.kind in ("none", "hash_column"):
        return checks
    out = []
    for c in checks:
        w = c.worst
        if c.verdict == PASS or w is None or len(w) == 0 or "test_row" not in w or "train_row" not in w:
            out.append(c); continue
        w = w.head(th.thumbnails)
        imgs = fp.fetch(list(w["test_row"]) + list(w["train_row"]))
        thumbs = [(f"test {tid} / train {rid}", imgs.get(int(t)), imgs.get(int(r)))
                  for t, r, tid, rid in zip(w["test_row"], w["train_row"], w["test_id"], w["train_id"])]
        out.append(dataclasses.replace(c, arrays={**c.arrays, "thumbs": thumbs}))
    return out



def _duplicate_judge(th: Thresholds, fp, df: pd.DataFrame, ra: np.ndarray, rb: np.ndarray,
                     reference_loader, rng_for: np.random.Generator):
    """How the near-duplicate check tells copies from look-alikes for one pair (train rows ra,
    test rows rb): (judge over pair positions, extra candidate pairs) - see audit/lookalike.py."""
    if th.duplicate_judge == "radius":
        return None, None
    hashes, sha = fp.hashes, fp.sha
    if fp.kind in ("none", "hash_column"):
        null = lookalike.hash_null(hashes[ra], rng_for)
        q = float(np.quantile(null, lookalike.NULL_QUANTILE)) if len(null) else 0.0
        nums = {"null": _null_numbers(null), "threshold_bits": q}

        def judge_hash(tp, rp):
            d = hamming(hashes[rb[tp]], hashes[ra[rp]]).astype(float)
            exact = np.zeros(len(tp), bool)
            if sha is not None:
                exact = np.asarray(sha, dtype=object)[rb[tp]] == np.asarray(sha, dtype=object)[ra[rp]]
            leak = (d < q) | exact
            return {"leak": leak, "ambiguous": ~leak}
        return _labelled(judge_hash, "hash", nums), None

    if reference_loader is not None:
        unchanged = fp.unchanged()
        loader = reference_loader

        def reference_loader(row: int):  # a row that cannot be re-rendered explains nothing
            try:
                return loader(row)
            except (AugsplitError, IndexError, KeyError, ValueError):
                return None
        changed = lookalike.changed_rows(rb, ra, unchanged, fp.fetch, reference_loader)
        extra = None
        if len(changed) and fp.coef is not None and len(ra):
            near = lookalike.most_similar(fp.coef[changed].astype(np.float32), fp.coef[ra].astype(np.float32))
            pos_of = {int(r): k for k, r in enumerate(rb)}
            extra = (np.repeat([pos_of[int(r)] for r in changed], near.shape[1]), near.ravel())
        nums = {"n_test_changed": int(len(changed)), "copy_ratio": lookalike.COPY_RATIO}

        def judge_render(tp, rp):
            return lookalike.judge_by_render(rb[tp], ra[rp], unchanged, fp.fetch, reference_loader)
        return _labelled(judge_render, "render", nums), extra

    null = lookalike.pixel_null(ra, hashes, sha, fp.fetch, rng_for)
    tau = lookalike.null_threshold(null)
    nums = {"null": _null_numbers(null), "threshold": tau}

    def judge_pixels(tp, rp):
        t, r = rb[tp], ra[rp]
        same = np.zeros(len(tp), bool) if sha is None else np.asarray(sha, dtype=object)[t] == np.asarray(sha, dtype=object)[r]
        return lookalike.judge_by_pixels(t, r, fp.fetch, tau, same)
    return _labelled(judge_pixels, "pixels", nums), None


def _labelled(judge, method: str, numbers: dict):
    """A judge carries its method's name and figures (reported even with no candidate)."""
    judge.method, judge.numbers = method, numbers
    return judge


def _null_numbers(null: np.ndarray) -> dict:
    null = np.asarray(null, float)
    if len(null) == 0:
        return {"n": 0}
    q = np.quantile(null, [0.0, 0.01, 0.05, 0.5])
    return {"n": int(len(null)), "min": float(q[0]), "p01": float(q[1]), "p05": float(q[2]), "median": float(q[3])}



