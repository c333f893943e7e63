"""run_audit: validate the inputs, run every applicable check on each pair of splits, and say
which checks were skipped and why. Returns an AuditResult; reports render it."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from ..errors import AugsplitError, DatasetError
from . import lookalike
from .category import check_category_overlap
from .footprint import check_footprint
from .inputs import (BBOX_COLUMNS, ImageLoader, TableSource, axis_scales, check_files_exist,
                     decode_image, open_table, read_image)
from .instances import check_instances
from .nearest_hash import check_near_duplicates, hamming
from .phash import fingerprint_images
from .proximity import check_proximity
from .regions import check_data_ranges, check_declared_regions
from .result import FAIL, PASS, AuditResult, CheckResult, Skipped, top_rows


@dataclass(frozen=True)
class Thresholds:
    """What the audit holds the data to. None means "nothing declared" for that property:
    the check then reports and warns instead of failing."""

    margin: float | None = None  # declared parameter margin, normalised units
    footprint_disjoint: bool | None = None  # declared: no shared pixel between the splits
    footprint_max_fraction: float = 0.0  # allowed fraction of overlapping test objects
    footprint_per_class: bool = True  # compare footprints within a class only (False: across classes too)
    # Hamming bits at or under which a test image's nearest train image is a candidate copy.
    # Candidates are then judged (audit/lookalike.py): by re-rendering on generated datasets,
    # else against the distances distinct training images show. A 1 px shift moves the hash by
    # up to 8 bits on noise backgrounds and up to 16 on flat ones (generated copies of changed
    # images are found by their DCT block instead; see lookalike.changed_rows).
    hash_radius: int = 8
    near_duplicates_fail: bool = True  # False: copies warn (pixel-identical copies still fail)
    duplicate_judge: str = "auto"  # "auto": judge candidates (see above); "radius": every candidate is a copy
    category_max_ratio: float | None = None  # fail when same/different-class IoU ratio exceeds it
    category_pairs: int = 2000
    seed: int = 0  # the category check's pair sampling and the near-duplicate null sample
    p: float = 2.0  # Minkowski p of parameter distances (2 = Euclidean)
    worst_k: int = 20
    thumbnails: int = 6
    hash_column: str = "phash"  # optional column of precomputed 64-bit hashes (int or hex)

    @classmethod
    def from_dict(cls, d: dict | None) -> "Thresholds":
        """Thresholds from a mapping, every value typed and range-checked: a DatasetError
        naming `thresholds.KEY` (with the closest known key for a misspelt one)."""
        d = dict(d or {})
        names = [f.name for f in dataclasses.fields(cls)]
        for k, v in d.items():
            if k not in names:
                import difflib

                close = difflib.get_close_matches(str(k), names, n=1)
                raise DatasetError(f"unknown threshold{f' (did you mean {close[0]!r}?)' if close else ''}; "
                                   f"known: {', '.join(sorted(names))}", where=f"thresholds.{k}")
        return cls(**d)

    def __post_init__(self):
        for f in dataclasses.fields(self):
            object.__setattr__(self, f.name, _typed(f.name, getattr(self, f.name)))


# name -> (type, lowest, highest, may be None); ranges are inclusive
_RULES = {
    "margin": (float, 0.0, None, True), "footprint_disjoint": (bool, None, None, True),
    "footprint_max_fraction": (float, 0.0, 1.0, False), "footprint_per_class": (bool, None, None, False),
    "hash_radius": (int, 0, 63, False), "near_duplicates_fail": (bool, None, None, False),
    "duplicate_judge": (("auto", "radius"), None, None, False),
    "category_max_ratio": (float, 0.0, None, True), "category_pairs": (int, 1, 10_000_000, False),
    "seed": (int, 0, 2**63 - 1, False), "p": (float, 1.0, float("inf"), False),
    "worst_k": (int, 0, 1_000_000, False), "thumbnails": (int, 0, 1000, False), "hash_column": (str, None, None, False),
}


def _typed(name: str, v):
    kind, lo, hi, nullable = _RULES[name]
    where = f"thresholds.{name}"
    if v is None:
        if nullable:
            return None
        raise DatasetError("needs a value", where=where)
    if isinstance(kind, tuple):
        if v not in kind:
            raise DatasetError(f"must be one of {', '.join(kind)}, got {v!r}", where=where)
        return v
    if kind is bool:
        if not isinstance(v, (bool, np.bool_)):
            raise DatasetError(f"must be true or false, got {v!r}", where=where)
        return bool(v)
    if kind is str:
        if not isinstance(v, str) or not v:
            raise DatasetError(f"must be a column name, got {v!r}", where=where)
        return v
    ok = isinstance(v, (int, np.integer)) if kind is int else isinstance(v, (int, float, np.integer, np.floating))
    if isinstance(v, (bool, np.bool_)) or not ok:
        noun = "an integer" if kind is int else "a number"
        raise DatasetError(f"must be {noun}, got {v!r}", where=where)
    v = kind(v)
    if v != v or (v in (float("inf"), float("-inf")) and hi != float("inf")):
        raise DatasetError(f"must be finite, got {v!r}", where=where)
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        rng = f"at least {lo:g}" if hi is None else f"in [{lo:g}, {hi:g}]"
        raise DatasetError(f"must be {rng}, got {v:g}", where=where)
    return v


def run_audit(table, axes: dict, pairs=None, margin: float | None = None, thresholds=None,
              image_loader: ImageLoader | None = None, mask_loader: Callable | None = None,
              canvas_hw: tuple[int, int] | None = None, regions: dict | None = None,
              column_map: dict | None = None, root=None, mask_rows=None,
              progress: bool = False, reference_loader: ImageLoader | None = None) -> AuditResult:
    """Audit a table for leakage between splits.

    table: DataFrame, CSV, Parquet file or dataset folder (columns as in augsplit.manifest;
    `column_map` {augsplit name: table column} maps foreign names). axes: {column: (lo, hi,
    periodic[, "log"])} or augsplit Axis objects. pairs: [(train, test), ...]; default
    "train" against every other split. Loaders take a table row number. `regions`
    {split: Region} enables the declared-region check; `margin` overrides thresholds.margin.
    `reference_loader` re-renders a row from its parameters (a generated dataset): it lets the
    near-duplicate check tell look-alikes the design makes from copies (audit/lookalike.py).

    A check that cannot run because the table lacks its columns is listed in `skipped`; when
    the columns are missing because `column_map` took them for another name, or a mapped name
    is not one the audit reads, that is bad input (DatasetError naming `column_map.NAME`).
    """
    th = thresholds if isinstance(thresholds, Thresholds) else Thresholds.from_dict(thresholds)
    if margin is not None:
        th = dataclasses.replace(th, margin=float(margin))
    src = open_table(table, column_map, root)
    region_cols = []
    for reg in (regions or {}).values():
        region_cols += [("class_index" if n == "class" else n) for n in reg.space.names]
    want = list(dict.fromkeys(["split", "image_id", "class_name", "instance", "instance_seen", *axes,
                               *BBOX_COLUMNS, "width", "height", "file", "sha256", th.hash_column, *region_cols]))
    _check_column_map(column_map, list(dict.fromkeys([*want, "image_bytes", "class_index"])))
    if th.hash_column != Thresholds.hash_column and th.hash_column not in src.columns:
        raise DatasetError(f"no column {th.hash_column!r} in the table, so near_duplicates cannot use it",
                           where="thresholds.hash_column")
    if "split" not in src.columns:
        raise DatasetError(f"table has no split column (columns: {', '.join(src.columns[:12])})",
                           where="column 'split'", hint="map one, e.g. column_map={'split': 'phase'}")
    if not isinstance(axes, dict) or not axes:
        raise DatasetError("no parameter axes given", where="axes")
    for name in axes:
        if name not in src.columns:
            raise DatasetError(f"no column {name!r} in the table", where=f"axes.{name}")
    df = src.read(want, progress=progress)
    split = df["split"].astype(str).to_numpy()
    present = list(pd.unique(split))
    pairs = _resolve_pairs(pairs, present)
    rows_of = {}
    for s in dict.fromkeys(x for p in pairs for x in p):
        r = np.flatnonzero(split == s)
        if len(r) == 0:
            raise DatasetError(f"split {s!r} has no rows (splits present: {', '.join(map(str, present))})",
                               where=f"split '{s}'")
        rows_of[s] = r
    audited = np.zeros(len(df), bool)
    for r in rows_of.values():
        audited[r] = True
    scales, notes = axis_scales(axes, df.loc[audited])
    ids = df["image_id"].astype(str).to_numpy() if "image_id" in df else np.arange(len(df))
    values = np.column_stack([pd.to_numeric(df[s.name], errors="coerce").to_numpy(float) for s in scales])
    checks: list[CheckResult] = []
    skipped: list[Skipped] = []

    has_bbox = all(c in df for c in BBOX_COLUMNS)
    bbox = np.column_stack([pd.to_numeric(df[c], errors="coerce").to_numpy(float) for c in BBOX_COLUMNS]) if has_bbox else None
    finite_res, ok = _check_finite(values, [s.name for s in scales], bbox, audited, ids, th.worst_k)
    checks.append(finite_res)

    fp = _Fingerprints(src, df, image_loader, th, progress, audited, coefficients=reference_loader is not None)
    guard = _GuardedMasks(mask_loader, bbox, df, ids) if mask_loader is not None and has_bbox else None
    mask_loader = guard
    hw = _canvas(canvas_hw, df, bbox, ok) if has_bbox else None
    cls = df["class_name"].astype(str).to_numpy() if "class_name" in df else None
    rng = np.random.default_rng(th.seed)
    mask_set = None if mask_rows is None else set(np.asarray(mask_rows, np.int64).tolist())

    for a, b in pairs:
        pair = (a, b)
        ra, rb = rows_of[a], rows_of[b]
        fa, fb = ra[ok[ra]], rb[ok[rb]]  # rows with finite parameters
        excl = (len(ra) - len(fa)) + (len(rb) - len(fb))
        note = f" ({excl} rows with non-finite values excluded, see finite_values)" if excl else ""

        # declared regions / data ranges
        if regions and a in regions and b in regions:
            pts_a, pts_b, missing = _region_points(regions[a], df, fa), _region_points(regions[b], df, fb), None
            if pts_a is None:
                missing = "region axes not all in the table; rows not checked against their regions"
            res = check_declared_regions(regions[a], regions[b], pts_a, pts_b, ids[fa], ids[fb], pair, th.worst_k)
            if missing:
                res = dataclasses.replace(res, detail=res.detail + f" ({missing})")
            checks.append(_globalise(res, fa, fb, row_cols=()))
        else:
            if regions:
                skipped.append(Skipped("declared_regions", pair, "no region declared for one of the splits; data ranges used"))
            checks.append(check_data_ranges(values[fa], values[fb], scales, pair))

        # parameter proximity
        res = check_proximity(values[fa], values[fb], scales, th.margin,
                              cls[fa] if cls is not None else None, cls[fb] if cls is not None else None,
                              ids[fa], ids[fb], th.p, pair, th.worst_k)
        checks.append(_globalise(dataclasses.replace(res, detail=res.detail + note), fa, fb))

        # footprint overlap and overlap against category
        if has_bbox:
            bi_a, bi_b = bbox[fa].astype(np.int64), bbox[fb].astype(np.int64)
            mr_a = mr_b = None
            if mask_loader is not None and mask_set is not None:
                mr_a = np.flatnonzero([r in mask_set for r in fa]); mr_b = np.flatnonzero([r in mask_set for r in fb])
            fcls = cls if th.footprint_per_class else None
            res = check_footprint(bi_a, bi_b, hw, fcls[fa] if fcls is not None else None, fcls[fb] if fcls is not None else None,
                                  mask_loader, fa, fb, mr_a, mr_b, th.footprint_disjoint, th.footprint_max_fraction,
                                  ids[fa], ids[fb], pair, th.worst_k)
            checks.append(_globalise(dataclasses.replace(res, detail=res.detail + note), fa, fb))
            if guard is not None:
                checks.append(guard.check(np.concatenate([fa, fb]), pair, th.worst_k))
            if cls is not None:
                checks.append(check_category_overlap(bi_a, cls[fa], bi_b, cls[fb], rng, hw, th.category_pairs,
                                                     mask_loader, fa, fb, th.category_max_ratio, pair))
            else:
                skipped.append(Skipped("category_overlap", pair, "no class_name column"))
        else:
            missing = [c for c in BBOX_COLUMNS if c not in df]
            for name in ("footprint_overlap", "category_overlap"):
                skipped.append(Skipped(name, pair, f"no footprints: columns {', '.join(missing)} missing"))

        # near-duplicate images (hashes of every row, not only finite-parameter ones)
        hashes, sha, reason = fp.get()
        if hashes is None:
            skipped.append(Skipped("near_duplicates", pair, reason))
        else:
            judge, extra = _duplicate_judge(th, fp, df, ra, rb, reference_loader, rng_for=np.random.default_rng(th.seed))
            res = check_near_duplicates(hashes[ra], hashes[rb], th.hash_radius,
                                        sha[ra] if sha is not None else None, sha[rb] if sha is not None else None,
                                        ids[ra], ids[rb], cls[rb] if cls is not None else None, pair, th.worst_k,
                                        th.near_duplicates_fail, judge=judge, extra_pairs=extra)
            if sha is None:
                res = dataclasses.replace(res, detail=res.detail + " (no content hashes: exact copies not checked)")
            checks.append(_globalise(res, ra, rb))

        # instance leakage
        if all(c in df for c in ("class_name", "instance", "instance_seen")):
            seen_b = df["instance_seen"].to_numpy()
            seen_a = df["instance_seen"].to_numpy()[ra]
            res = check_instances(cls[ra], df["instance"].to_numpy()[ra], cls[rb], df["instance"].to_numpy()[rb],
                                  _as_bool(seen_b[rb], f"column 'instance_seen' (split {b!r})"),
                                  _as_bool(seen_a, f"column 'instance_seen' (split {a!r})"),
                                  ids[ra], ids[rb], pair, th.worst_k)
            checks.append(_globalise(res, ra, rb))
        else:
            need = [c for c in ("class_name", "instance", "instance_seen") if c not in df]
            skipped.append(Skipped("instance_leakage", pair, f"columns {', '.join(need)} missing"))

    checks = _attach_thumbnails(checks, fp, th)
    inputs = {
        "source": "DataFrame" if src.kind == "frame" else str(table),
        "n_rows": int(len(df)),
        "rows_per_split": {str(k): int(v) for k, v in pd.Series(split).value_counts(sort=False).items()},
        "axes": {s.name: {"lo": s.lo, "hi": s.hi, "periodic": s.periodic, "log": s.log} for s in scales},
        "notes": notes,
        "canvas": list(hw) if hw else None,
        "images": fp.kind,
    }
    arrays = {"axis_hist": _axis_histograms(values, scales, split, rows_of, ok)}
    return AuditResult(tuple(checks), tuple(pairs), tuple(skipped), inputs, arrays)


# ---- helpers -------------------------------------------------------------------------------

def _check_column_map(column_map: dict | None, known: list) -> None:
    """Every mapped name must be one the audit reads (did-you-mean otherwise), and no column
    the audit reads may be renamed to another name: a check would then skip or fail for lack
    of a column the table has, which is the map's doing, so it is bad input, never a skip."""
    mapping = dict(column_map or {})
    import difflib

    for dst, src in mapping.items():
        if dst not in known:
            close = difflib.get_close_matches(str(dst), known, n=1)
            raise DatasetError(f"{dst!r} is not a column the audit reads"
                               + (f" (did you mean {close[0]!r}?)" if close else "")
                               + f"; it reads {', '.join(known)}", where=f"column_map.{dst}")
        if src != dst and src in known and src not in mapping:
            raise DatasetError(f"the map takes column {src!r}, which the audit reads as {src!r} itself, for {dst!r}; "
                               "the checks that need it would not run", where=f"column_map.{dst}")


class _GuardedMasks:
    """The mask loader, guarded: a row whose footprint cannot be re-made from its parameters,
    or whose mask does not fit its recorded bbox, is recorded (reported by `check`, naming
    split and image id) and counts as its bbox instead of stopping the audit."""

    def __init__(self, loader, bbox: np.ndarray, df: pd.DataFrame, ids: np.ndarray):
        self.loader, self.bbox, self.ids = loader, bbox, ids
        self.split = df["split"].astype(str).to_numpy()
        self.bad: dict[int, str] = {}

    def __call__(self, row: int):
        row = int(row)
        if row in self.bad:
            return None
        try:
            m = self.loader(row)
        except (AugsplitError, IndexError, KeyError, ValueError) as exc:
            self.bad[row] = f"footprint cannot be re-made: {exc}"
            return None
        if m is None:
            return None
        b = self.bbox[row]
        want = (int(b[3]) - int(b[1]), int(b[2]) - int(b[0])) if np.isfinite(b).all() else None
        if np.shape(m) != want:
            self.bad[row] = f"mask shape {tuple(np.shape(m))} does not match its bbox {want}"
            return None
        return m

    def check(self, rows: np.ndarray, pair, worst_k: int) -> CheckResult:
        bad = [r for r in sorted(self.bad) if r in set(rows.tolist())]
        frame = pd.DataFrame({"row": bad, "split": self.split[bad] if bad else [],
                              "id": self.ids[bad] if bad else [], "reason": [self.bad[r] for r in bad]})
        numbers = {"n_rows_checked": int(len(rows)), "n_bad_rows": len(bad)}
        if not bad:
            return CheckResult("row_integrity", PASS, numbers, None,
                               "every row's footprint re-made from its parameters fits its recorded bbox", pair)
        first = frame.iloc[0]
        return CheckResult("row_integrity", FAIL, numbers, frame.head(worst_k),
                           f"{len(bad)} of {len(rows)} rows do not match their own parameters (e.g. {first['id']} "
                           f"of split {first['split']}: {first['reason']}); they count as their bbox", pair)


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



def _resolve_pairs(pairs, present: list) -> list[tuple[str, str]]:
    if pairs is None:
        if "train" not in present:
            raise DatasetError(f"no 'train' split to audit against (splits: {', '.join(map(str, present))})",
                               where="pairs", hint="name the pairs, e.g. pairs=[('fit', 'holdout')]")
        others = [s for s in present if s != "train"]
        if not others:
            raise DatasetError("only the 'train' split is present: nothing to audit it against", where="pairs")
        return [("train", s) for s in others]
    out = []
    for p in pairs:
        if len(p) != 2 or p[0] == p[1]:
            raise DatasetError(f"a pair names two different splits, got {p!r}", where="pairs")
        out.append((str(p[0]), str(p[1])))
    return out


def _as_bool(v: np.ndarray, where: str) -> np.ndarray:
    s = pd.Series(v)
    if s.isna().any():
        raise DatasetError(f"{int(s.isna().sum())} missing values", where=where)
    if s.dtype == bool:
        return s.to_numpy()
    text = s.astype(str).str.lower()
    mapped = text.map({"true": True, "false": False, "1": True, "0": False, "yes": True, "no": False})
    if mapped.isna().any():
        raise DatasetError(f"not a boolean: {text[mapped.isna()].iloc[0]!r}", where=where)
    return mapped.to_numpy(bool)


def _check_finite(values, names, bbox, audited, ids, worst_k) -> tuple[CheckResult, np.ndarray]:
    """NaN/inf parameters (and bboxes) are reported row by row, never dropped silently."""
    bad_cols = ~np.isfinite(values)
    if bbox is not None:
        bad_cols = np.column_stack([bad_cols, ~np.isfinite(bbox)])
        names = list(names) + list(BBOX_COLUMNS)
    bad = bad_cols.any(axis=1) & audited
    rows = np.flatnonzero(bad)
    frame = pd.DataFrame({"row": rows, "id": ids[rows],
                          "columns": [", ".join(n for n, b in zip(names, bad_cols[r]) if b) for r in rows]})
    numbers = {"n_rows_checked": int(audited.sum()), "n_bad_rows": int(len(rows)),
               "per_column": {n: int((bad_cols[:, k] & audited).sum()) for k, n in enumerate(names)},
               "bad_rows": [int(r) for r in rows[:1000]]}
    if len(rows):
        shown = ", ".join(str(i) for i in ids[rows[:5]])
        return (CheckResult("finite_values", FAIL, numbers, top_rows(frame, "row", worst_k, True),
                            f"{len(rows)} rows have NaN or infinite parameters (e.g. {shown}); they are excluded "
                            "from the geometric checks", None), ~bad)
    return CheckResult("finite_values", PASS, numbers, None, "every parameter is a finite number", None), ~bad


def _canvas(canvas_hw, df, bbox, ok) -> tuple[int, int]:
    if canvas_hw is not None:
        return int(canvas_hw[0]), int(canvas_hw[1])
    if "width" in df and "height" in df:
        w = pd.to_numeric(df["width"], errors="coerce").max(); h = pd.to_numeric(df["height"], errors="coerce").max()
        if np.isfinite(w) and np.isfinite(h) and w > 0 and h > 0:
            return int(h), int(w)
    b = bbox[ok]
    return max(int(b[:, 3].max()) if len(b) else 1, 1), max(int(b[:, 2].max()) if len(b) else 1, 1)


def _region_points(region, df, rows) -> dict | None:
    pts = {}
    for n in region.space.names:
        col = "class_index" if n == "class" else n
        if col not in df:
            return None
        pts[n] = pd.to_numeric(df[col], errors="coerce").to_numpy(float)[rows]
    return pts


def _globalise(res: CheckResult, rows_a: np.ndarray, rows_b: np.ndarray, row_cols=("test_row", "train_row")) -> CheckResult:
    """Row positions inside the pair's subsets -> row numbers of the whole table."""
    w = res.worst
    if w is None or len(w) == 0:
        return res
    w = w.copy()
    if "test_row" in w and "test_row" in row_cols:
        w["test_row"] = rows_b[w["test_row"].to_numpy(np.int64)]
    if "train_row" in w and "train_row" in row_cols:
        t = w["train_row"].to_numpy(np.int64)
        w["train_row"] = np.where(t >= 0, rows_a[np.maximum(t, 0)], -1)
    if "row" in w and "split" in w and res.pair:
        r = w["row"].to_numpy(np.int64)
        w["row"] = np.where(w["split"].to_numpy() == res.pair[0], rows_a[np.minimum(r, len(rows_a) - 1)],
                            rows_b[np.minimum(r, len(rows_b) - 1)])
    return dataclasses.replace(res, worst=w)


class _Fingerprints:
    """Perceptual and content hashes of every row, computed once, on first need."""

    def __init__(self, src: TableSource, df: pd.DataFrame, image_loader, th: Thresholds, progress: bool, rows: np.ndarray,
                 coefficients: bool = False):
        self.src, self.df, self.loader, self.th, self.progress, self.rows = src, df, image_loader, th, progress, rows
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
        root = self.src.root or Path(".")
        names = self.df["file"].astype(str).to_numpy() if "file" in self.df else None

        def from_file(r):
            if not self.has_file[r]:
                raise DatasetError("row has neither image bytes nor an image file", where=f"row {int(r)}")
            return read_image(root, names[r])

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
            yield from _ordered_map(lambda job: decode_image(job[1], f"row {job[0]}") if job[1] is not None
                                    else from_file(job[0]), jobs())

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


def _axis_histograms(values, scales, split, rows_of, ok, bins: int = 40) -> dict:
    out = {}
    for k, s in enumerate(scales):
        u = s.normalise(values[:, k])
        fin = u[np.isfinite(u) & ok]
        lo = min(0.0, float(fin.min())) if len(fin) else 0.0
        hi = max(1.0, float(fin.max())) if len(fin) else 1.0
        edges = np.linspace(lo, hi, bins + 1)
        counts = {}
        for name, rows in rows_of.items():
            v = u[rows]
            counts[name] = np.histogram(v[np.isfinite(v)], bins=edges)[0]
        out[s.name] = {"edges": edges * (s.hi - s.lo) + s.lo if not s.log else np.exp(edges * (np.log(s.hi) - np.log(s.lo)) + np.log(s.lo)),
                       "counts": counts}
    return out
