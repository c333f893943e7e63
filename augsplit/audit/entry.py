"""What `augsplit audit` audits: an augsplit dataset folder, a parameter log, or any table.

A dataset folder brings its own spec: the axes, the declared regions and the claims (each
guarantee is audited on its own pair, with its own margin or footprint claim; pairs without a
claim are audited for leaks that need no claim, like copied images). Footprints are exact:
re-rendered from each row. A parameter log (or a table) is audited against a spec when one
is given, else against ranges taken from flags or from the data.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd

from ..dataset import layout as lay
from ..errors import DatasetError
from ..space.axes import CLASS
from .result import FAIL, PASS, AuditResult, CheckResult, merge_arrays
from .run import Thresholds, wanted_columns, run_audit


def _merge(results: list[AuditResult]) -> AuditResult:
    first = results[0]
    seen_global = set()
    checks = []
    for r in results:
        for c in r.checks:
            if c.pair is None:  # table-wide checks (e.g. finite values) once
                if c.name in seen_global:
                    continue
                seen_global.add(c.name)
            checks.append(c)
    return AuditResult(tuple(checks), tuple(p for r in results for p in r.pairs),
                       tuple(s for r in results for s in r.skipped), first.inputs,
                       merge_arrays([r.arrays for r in results]))


def _claims(plan, a: str, b: str) -> dict:
    """Threshold fields declared by the spec's guarantees between splits a and b."""
    out: dict = {}
    for g in plan.settings.claims:
        if set(g.between) != {a, b}:
            continue
        if g.disjoint == "parameters":
            # margin 0 still claims disjointness: only identical parameters fall below 1e-12
            out["margin"] = max(out.get("margin", 0.0), g.margin, 1e-12)
        else:
            out["footprint_disjoint"] = True
            out["footprint_per_class"] = g.per_class
    return out


def _thresholds(plan, extra: dict | None) -> dict:
    d = dict(plan.settings.audit) if plan is not None else {}
    d.update(extra or {})
    try:
        Thresholds.from_dict(d)
    except DatasetError as exc:
        raise DatasetError(exc.message, where=(exc.where or "").replace("thresholds.", "audit.")) from None
    return d


def _pairs(plan, pairs) -> list[tuple[str, str]]:
    if pairs:
        return [tuple(p) for p in pairs]
    train = [s.name for s in plan.splits if s.role == "train"] or [plan.splits[0].name]
    return [(train[0], s.name) for s in plan.splits if s.name != train[0]]


def audit_dataset(root, pairs=None, thresholds: dict | None = None, exact_masks: bool = True,
                  progress: bool = False, *, workers: int = 1, executor: str = "auto",
                  scheduler: str | None = None) -> AuditResult:
    """Audit a dataset folder against its own spec (see the module docstring). A row whose
    stored image cannot be read (missing, out of the folder, not a regular file, undecodable)
    fails the `image_files` check, naming split and image id. The image hashes and footprint
    masks of every audited split are made once, by `workers` processes on `executor` (or on
    the dask `scheduler`), as generate makes shards (audit/parallel.py): same result on any."""
    from ..dataset import open_dataset
    from ..threads import opencv_threads
    from .folder_rows import FolderRows
    from ..executors import check_options
    from .parallel import RowCache

    check_options(workers, executor)
    folder = open_dataset(root)
    root, built = folder.root, folder.built
    plan = built.plan
    axes = {n: plan.space[n] for n in plan.space.names if n != CLASS}
    regions = {s.name: s.region for s in plan.splits}
    base = _thresholds(built.plan, thresholds)
    rows = FolderRows(folder, ["class_index", "tar_file", *wanted_columns(axes, regions, Thresholds.from_dict(base))])
    df = rows.df
    if df.empty:
        raise DatasetError("the dataset has no manifest rows", where=str(root / lay.MANIFEST_DIR))
    audited = _pairs(plan, pairs)
    for a, b in audited:
        for name in (a, b):
            if name not in regions:
                raise DatasetError(f"the dataset has no split '{name}' (it has {', '.join(regions)})", where=f"pair {a}:{b}")
    cache = RowCache(folder, rows.part_rows, len(df), masks=exact_masks, workers=workers, executor=executor,
                     scheduler=scheduler, progress=progress)
    cache.ensure(name for pair in audited for name in pair)  # each split once, whatever the pairs
    results = []
    with opencv_threads(1):  # the checks' own image work (look-alikes, thumbnails): one thread
        for a, b in audited:
            claims = _claims(built.plan, a, b)
            th = dict(base, **claims)
            declared = {a: regions[a], b: regions[b]} if claims else None
            results.append(run_audit(df, axes, pairs=[(a, b)], thresholds=th, image_loader=rows.image,
                                     mask_loader=cache if exact_masks else None, canvas_hw=folder.hw,
                                     regions=declared, root=root, progress=progress,
                                     reference_loader=rows.rendered, fingerprints=cache))
    merged = _merge(results)
    if cache.broken:
        merged = dataclasses.replace(merged, checks=merged.checks + (_image_files_check(df, cache.broken),))
    return merged


def _image_files_check(df: pd.DataFrame, broken: dict[int, str], worst_k: int = 20) -> CheckResult:
    rows = sorted(broken)
    worst = pd.DataFrame({"row": rows, "split": df["split"].to_numpy()[rows], "image_id": df["image_id"].to_numpy()[rows],
                          "problem": [broken[r] for r in rows]}).head(worst_k)
    first = worst.iloc[0]
    # a stored image that cannot be read, a row that cannot be re-rendered, or one refused for
    # naming another file or identity than its own: each reason is in the row's problem
    detail = (f"{len(rows)} rows' images cannot be had (read or re-made), e.g. split {first['split']}, "
              f"image {first['image_id']}: {first['problem']}")
    return CheckResult("image_files", FAIL, {"n_unreadable": len(rows)}, worst, detail)


def _log_points(log: pd.DataFrame, space) -> dict:
    """The log's draws as points of the spec's space (class from class_index, else 0)."""
    names = [n for n in space.names if n != CLASS]
    missing = [n for n in names if n not in log.columns]
    if missing:
        raise DatasetError(f"the log has no column {missing[0]!r} (an axis of the spec)", where=f"axes.{missing[0]}")
    pts = {n: pd.to_numeric(log[n], errors="coerce").to_numpy(float) for n in names}
    pts[CLASS] = log["class_index"].to_numpy(float) if "class_index" in log else np.zeros(len(log))
    return pts


def _mark_intrusions(train, tests, sub: dict, idx: np.ndarray, intrude: np.ndarray, where_to: np.ndarray) -> None:
    """Training draws (`sub`, table rows `idx`) inside a held-out region: marked in `intrude`,
    the region's split named in `where_to`."""
    for t in tests:
        if (t.region & train.region).mass() > 0:
            continue  # an i.i.d. split shares the training region by design
        hit = t.region.contains(sub) & ~train.region.contains(sub)
        intrude[idx[hit]] = True
        where_to[idx[hit]] = t.name


def check_log_regions(log: pd.DataFrame, plan, ids=None, worst_k: int = 20) -> CheckResult:
    """Every logged draw lies in the region of the split it says it came from, and no draw of a
    training split lies in a held-out (test) region."""
    pts = _log_points(log, plan.space)
    split = log["split"].astype(str).to_numpy()
    ids = np.arange(len(log)) if ids is None else np.asarray(ids)
    outside = np.zeros(len(log), bool)
    intrude = np.zeros(len(log), bool)
    where_to = np.full(len(log), "", dtype=object)
    tests = [s for s in plan.splits if s.role == "test"]
    for s in plan.splits:
        rows = split == s.name
        if not rows.any():
            continue
        sub = {k: v[rows] for k, v in pts.items()}
        outside[rows] = ~s.region.contains(sub)
        if s.role == "train":
            _mark_intrusions(s, tests, sub, np.flatnonzero(rows), intrude, where_to)
    unknown = sorted(set(split) - {s.name for s in plan.splits})
    n_bad = int(outside.sum() + intrude.sum())
    worst = pd.DataFrame({"row": ids[outside | intrude], "split": split[outside | intrude],
                          "inside_held_out": where_to[outside | intrude]}).head(worst_k)
    nums = {"rows": int(len(log)), "rows_outside_own_region": int(outside.sum()),
            "train_rows_inside_held_out_regions": int(intrude.sum()), "unknown_splits": unknown}
    detail = ("every draw lies in its own split's region and none in a held-out region" if n_bad == 0 and not unknown
              else f"{int(intrude.sum())} training draws inside held-out regions, {int(outside.sum())} draws outside "
                   f"their split's region" + (f", unknown splits {unknown}" if unknown else ""))
    return CheckResult("log_regions", PASS if n_bad == 0 and not unknown else FAIL, nums, worst, detail)


def audit_table(table, spec_path=None, pairs=None, axes: dict | None = None, column_map: dict | None = None,
                thresholds: dict | None = None, progress: bool = False) -> AuditResult:
    """Audit a parameter log or any CSV/Parquet table (see the module docstring)."""
    if spec_path is None:
        if not axes:
            raise DatasetError("give a spec (--spec) or the axes to audit (--axis name=lo:hi[:circular|:log])",
                               where=str(table))
        return run_audit(table, axes, pairs=pairs, thresholds=_thresholds(None, thresholds),
                         column_map=column_map, progress=progress)
    from ..build import open_spec
    from .inputs import open_table

    built = open_spec(spec_path)
    plan = built.plan
    src = open_table(table, column_map)
    if "split" not in src.columns:
        raise DatasetError("the table has no split column", where="column 'split'")
    names = [n for n in plan.space.names if n != CLASS]
    log = src.read(["split", "class_index", "class_name", "image_id", *names], progress=progress)
    if "class_index" not in log and "class_name" in log:
        log["class_index"] = log["class_name"].map({c: i for i, c in enumerate(plan.classes)})
    region_check = check_log_regions(log, plan)
    present = set(log["split"].astype(str))
    wanted = _pairs(plan, pairs)
    runnable = [p for p in wanted if p[0] in present and p[1] in present]
    results = []
    base = _thresholds(built.plan, thresholds)
    for a, b in runnable:
        th = dict(base, **_claims(built.plan, a, b))
        results.append(run_audit(table, {n: plan.space[n] for n in names}, pairs=[(a, b)], thresholds=th,
                                 regions={a: plan.split(a).region, b: plan.split(b).region} if _claims(built.plan, a, b) else None,
                                 column_map=column_map, progress=progress))
    if not results:
        return AuditResult((region_check,), (), (), {"table": str(table), "spec": str(spec_path)}, {})
    merged = _merge(results)
    return dataclasses.replace(merged, checks=(region_check,) + merged.checks)


