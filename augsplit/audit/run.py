"""run_audit: validate the inputs, prepare what the checks read, run every applicable check
(audit/checks.py, in order) on each pair of splits, and say which checks were skipped and why.
Returns an AuditResult; reports render it."""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np
import pandas as pd

from ..errors import DatasetError
from .checks import AuditInputs, PairRows, _check_finite, _GuardedMasks, run_pair_checks
from .fingerprints import _attach_thumbnails, _Fingerprints
from .inputs import BBOX_COLUMNS, ImageLoader, TableSource, axis_scales, open_table
from .result import AuditResult, CheckResult, Skipped
from .thresholds import Thresholds

__all__ = ["run_audit", "Thresholds"]


def run_audit(table, axes: dict, pairs=None, margin: float | None = None, thresholds=None,
              image_loader: ImageLoader | None = None, mask_loader: Callable | None = None,
              canvas_hw: tuple[int, int] | None = None, regions: dict | None = None,
              column_map: dict | None = None, root=None, mask_rows=None,
              progress: bool = False, reference_loader: ImageLoader | None = None, fingerprints=None) -> AuditResult:
    """Audit a table for leakage between splits.

    table: DataFrame, CSV, Parquet file or dataset folder (columns as in augsplit.manifest;
    `column_map` {augsplit name: table column} maps foreign names). axes: {column: (lo, hi,
    periodic[, "log"])} or augsplit Axis objects. pairs: [(train, test), ...]; default
    "train" against every other split. Loaders take a table row number. `regions`
    {split: Region} enables the declared-region check; `margin` overrides thresholds.margin.
    `reference_loader` re-renders a row from its parameters (a generated dataset): it lets the
    near-duplicate check tell look-alikes the design makes from copies (audit/lookalike.py).
    `fingerprints` (with `image_loader`): every row's image hashes made before, an object with
    `hashes`, `sha` and `coef` arrays by table row (audit/parallel.py's RowCache).

    A check that cannot run because the table lacks its columns is listed in `skipped`; when
    the columns are missing because `column_map` took them for another name, or a mapped name
    is not one the audit reads, that is bad input (DatasetError naming `column_map.NAME`).
    """
    th = thresholds if isinstance(thresholds, Thresholds) else Thresholds.from_dict(thresholds)
    if margin is not None:
        th = dataclasses.replace(th, margin=float(margin))
    src = open_table(table, column_map, root)
    want = wanted_columns(axes, regions, th)
    _check_inputs(src, axes, th, column_map, want)
    df = src.read(want, progress=progress)
    split = df["split"].astype(str).to_numpy()
    pairs, rows_of = _pairs_and_rows(pairs, split)
    audited = np.zeros(len(df), bool)
    for r in rows_of.values():
        audited[r] = True
    scales, notes = axis_scales(axes, df.loc[audited])
    data, finite = _prepare(src, df, th, scales, audited, image_loader, mask_loader, canvas_hw, regions,
                            mask_rows, progress, reference_loader, fingerprints)
    checks: list[CheckResult] = [finite]
    skipped: list[Skipped] = []
    for a, b in pairs:
        results, skips = run_pair_checks(data, PairRows.of(a, b, rows_of, data.ok))
        checks += results
        skipped += skips
    checks = _attach_thumbnails(checks, data.fp, th)
    inputs = {
        "source": "DataFrame" if src.kind == "frame" else str(table),
        "n_rows": int(len(df)),
        "rows_per_split": {str(k): int(v) for k, v in pd.Series(split).value_counts(sort=False).items()},
        "axes": {s.name: {"lo": s.lo, "hi": s.hi, "periodic": s.periodic, "log": s.log} for s in scales},
        "notes": notes,
        "canvas": list(data.hw) if data.hw else None,
        "images": data.fp.kind,
    }
    arrays = {"axis_hist": _axis_histograms(data.values, scales, split, rows_of, data.ok)}
    return AuditResult(tuple(checks), tuple(pairs), tuple(skipped), inputs, arrays)


# ---- helpers -------------------------------------------------------------------------------

def wanted_columns(axes: dict, regions: dict | None, th: Thresholds) -> list[str]:
    """The columns the audit reads, in order (region axes: `class` is the class_index column)."""
    region_cols = [("class_index" if n == "class" else n) for reg in (regions or {}).values() for n in reg.space.names]
    return list(dict.fromkeys(["split", "image_id", "class_name", "instance", "instance_seen", *axes,
                               *BBOX_COLUMNS, "width", "height", "file", "sha256", th.hash_column, *region_cols]))


def _check_inputs(src: TableSource, axes, th: Thresholds, column_map, want: list) -> None:
    """Bad input named in one line before anything is read."""
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


def _pairs_and_rows(pairs, split: np.ndarray) -> tuple[list[tuple[str, str]], dict]:
    """The pairs audited and the table rows of every split they name (none may be empty)."""
    present = list(pd.unique(split))
    pairs = _resolve_pairs(pairs, present)
    rows_of = {}
    for s in dict.fromkeys(x for p in pairs for x in p):
        r = np.flatnonzero(split == s)
        if len(r) == 0:
            raise DatasetError(f"split {s!r} has no rows (splits present: {', '.join(map(str, present))})",
                               where=f"split '{s}'")
        rows_of[s] = r
    return pairs, rows_of


def _prepare(src, df, th, scales, audited, image_loader, mask_loader, canvas_hw, regions, mask_rows,
             progress, reference_loader, fingerprints=None) -> tuple[AuditInputs, CheckResult]:
    """What the checks read, and the finite-values check (which decides the rows they use)."""
    ids = df["image_id"].astype(str).to_numpy() if "image_id" in df else np.arange(len(df))
    values = np.column_stack([pd.to_numeric(df[s.name], errors="coerce").to_numpy(float) for s in scales])
    has_bbox = all(c in df for c in BBOX_COLUMNS)
    bbox = (np.column_stack([pd.to_numeric(df[c], errors="coerce").to_numpy(float) for c in BBOX_COLUMNS])
            if has_bbox else None)
    finite, ok = _check_finite(values, [s.name for s in scales], bbox, audited, ids, th.worst_k)
    fp = _Fingerprints(src, df, image_loader, th, progress, audited, coefficients=reference_loader is not None,
                       computed=fingerprints if image_loader is not None else None)
    masks = _GuardedMasks(mask_loader, bbox, df, ids) if mask_loader is not None and has_bbox else None
    data = AuditInputs(
        df=df, th=th, scales=scales, values=values, ids=ids,
        cls=df["class_name"].astype(str).to_numpy() if "class_name" in df else None,
        bbox=bbox, ok=ok, hw=_canvas(canvas_hw, df, bbox, ok) if has_bbox else None, fp=fp, masks=masks,
        mask_set=None if mask_rows is None else set(np.asarray(mask_rows, np.int64).tolist()),
        regions=regions or {}, reference_loader=reference_loader, rng=np.random.default_rng(th.seed))
    return data, finite

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



def _canvas(canvas_hw, df, bbox, ok) -> tuple[int, int]:
    if canvas_hw is not None:
        return int(canvas_hw[0]), int(canvas_hw[1])
    if "width" in df and "height" in df:
        w = pd.to_numeric(df["width"], errors="coerce").max(); h = pd.to_numeric(df["height"], errors="coerce").max()
        if np.isfinite(w) and np.isfinite(h) and w > 0 and h > 0:
            return int(h), int(w)
    b = bbox[ok]
    return max(int(b[:, 3].max()) if len(b) else 1, 1), max(int(b[:, 2].max()) if len(b) else 1, 1)



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
