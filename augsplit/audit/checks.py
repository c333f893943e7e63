"""The audit's checks as an ordered list of small objects. Each names itself, the columns and
other inputs (images, masks, regions) it needs, says whether it applies to this input (and,
when it does not, why: the reason is recorded as a Skipped), and runs on one pair of splits,
returning CheckResults with row numbers of the whole table. `run_audit` loops over them."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from ..errors import AugsplitError, DatasetError
from .category import check_category_overlap
from .fingerprints import _duplicate_judge, _Fingerprints
from .footprint import check_footprint, row_pixels
from .inputs import BBOX_COLUMNS
from .instances import check_instances
from .nearest_hash import check_near_duplicates
from .proximity import check_proximity
from .regions import check_data_ranges, check_declared_regions
from .result import FAIL, PASS, CheckResult, Skipped, top_rows
from .thresholds import Thresholds

INSTANCE_COLUMNS = ("class_name", "instance", "instance_seen")


@dataclass
class AuditInputs:
    """Everything the checks read, prepared once per audit."""

    df: pd.DataFrame
    th: Thresholds
    scales: list
    values: np.ndarray  # parameters, one column per scale
    ids: np.ndarray
    cls: np.ndarray | None  # class names
    bbox: np.ndarray | None  # x0, y0, x1, y1 per row
    ok: np.ndarray  # rows with finite parameters (and bbox)
    hw: tuple[int, int] | None  # canvas
    fp: _Fingerprints
    masks: "_GuardedMasks | None"
    mask_set: set | None  # rows whose footprint is a mask (None: every row the loader gives)
    regions: dict
    reference_loader: Callable | None
    rng: np.random.Generator  # the category check's pair sampling, shared by all pairs

    def column(self, name: str) -> np.ndarray:
        return self.df[name].to_numpy()


@dataclass(frozen=True)
class PairRows:
    """One pair of splits: all rows (ra train, rb test) and those with finite parameters."""

    a: str
    b: str
    ra: np.ndarray
    rb: np.ndarray
    fa: np.ndarray
    fb: np.ndarray

    @classmethod
    def of(cls, a: str, b: str, rows_of: dict, ok: np.ndarray) -> "PairRows":
        ra, rb = rows_of[a], rows_of[b]
        return cls(a, b, ra, rb, ra[ok[ra]], rb[ok[rb]])

    @property
    def pair(self) -> tuple[str, str]:
        return (self.a, self.b)

    @property
    def note(self) -> str:
        excl = (len(self.ra) - len(self.fa)) + (len(self.rb) - len(self.fb))
        return f" ({excl} rows with non-finite values excluded, see finite_values)" if excl else ""


class Check:
    """One audit check. `needs`: table columns it reads; `uses`: other inputs (images, masks,
    regions). `applies` says whether it runs on this input; when it does not, `skip_reason`
    is recorded (None: not applicable, nothing to say)."""

    name: str = ""
    needs: tuple[str, ...] = ()
    uses: tuple[str, ...] = ()

    def missing(self, data: AuditInputs) -> list[str]:
        return [c for c in self.needs if c not in data.df]

    def applies(self, data: AuditInputs, p: PairRows) -> bool:
        return not self.missing(data)

    def skip_reason(self, data: AuditInputs, p: PairRows) -> str | None:
        return f"columns {', '.join(self.missing(data))} missing"

    def run(self, data: AuditInputs, p: PairRows) -> list[CheckResult]:
        raise NotImplementedError

    def __repr__(self) -> str:
        return f"{type(self).__name__}(name={self.name!r}, needs={self.needs!r}, uses={self.uses!r})"


def _with_note(res: CheckResult, note: str) -> CheckResult:
    return dataclasses.replace(res, detail=res.detail + note) if note else res


def _of(arr: np.ndarray | None, rows: np.ndarray):
    return arr[rows] if arr is not None else None


class DeclaredRegions(Check):
    name, uses = "declared_regions", ("regions",)

    def applies(self, data, p):
        return bool(data.regions) and p.a in data.regions and p.b in data.regions

    def skip_reason(self, data, p):
        if data.regions:
            return "no region declared for one of the splits; data ranges used"
        return None

    def run(self, data, p):
        reg_a, reg_b = data.regions[p.a], data.regions[p.b]
        pts_a, pts_b = _region_points(reg_a, data.df, p.fa), _region_points(reg_b, data.df, p.fb)
        res = check_declared_regions(reg_a, reg_b, pts_a, pts_b, data.ids[p.fa], data.ids[p.fb], p.pair,
                                     data.th.worst_k)
        if pts_a is None:
            res = _with_note(res, " (region axes not all in the table; rows not checked against their regions)")
        return [_globalise(res, p.fa, p.fb, row_cols=())]


class DataRanges(Check):
    """Runs where no regions are declared for the pair: the ranges the data covers, reported
    under the declared-region check's name (its stand-in)."""

    name = "declared_regions"

    def applies(self, data, p):
        return not DeclaredRegions().applies(data, p)

    def skip_reason(self, data, p):
        return None

    def run(self, data, p):
        return [check_data_ranges(data.values[p.fa], data.values[p.fb], data.scales, p.pair)]


class Proximity(Check):
    name = "parameter_proximity"

    def run(self, data, p):
        th = data.th
        res = check_proximity(data.values[p.fa], data.values[p.fb], data.scales, th.margin, _of(data.cls, p.fa),
                              _of(data.cls, p.fb), data.ids[p.fa], data.ids[p.fb], th.p, p.pair, th.worst_k)
        return [_globalise(_with_note(res, p.note), p.fa, p.fb)]


class _Footprints(Check):
    needs = BBOX_COLUMNS
    uses = ("masks",)

    def skip_reason(self, data, p):
        return f"no footprints: columns {', '.join(self.missing(data))} missing"


class Footprint(_Footprints):
    name = "footprint_overlap"

    def run(self, data, p):
        th, bbox = data.th, data.bbox
        mr_a = mr_b = None
        if data.masks is not None and data.mask_set is not None:
            mr_a = np.flatnonzero([r in data.mask_set for r in p.fa])
            mr_b = np.flatnonzero([r in data.mask_set for r in p.fb])
        fcls = data.cls if th.footprint_per_class else None
        res = check_footprint(bbox[p.fa].astype(np.int64), bbox[p.fb].astype(np.int64), data.hw,
                              _of(fcls, p.fa), _of(fcls, p.fb), data.masks, p.fa, p.fb, mr_a, mr_b,
                              th.footprint_disjoint, th.footprint_max_fraction, data.ids[p.fa], data.ids[p.fb],
                              p.pair, th.worst_k)
        return [_globalise(_with_note(res, p.note), p.fa, p.fb)]


class RowIntegrity(_Footprints):
    """Rows whose mask could not be re-made or does not fit its bbox (found while the footprint
    check read them); runs only with a mask loader."""

    name = "row_integrity"

    def applies(self, data, p):
        return super().applies(data, p) and data.masks is not None

    def skip_reason(self, data, p):
        return None

    def run(self, data, p):
        return [data.masks.check(np.concatenate([p.fa, p.fb]), p.pair, data.th.worst_k)]


class CategoryOverlap(_Footprints):
    name = "category_overlap"
    needs = (*BBOX_COLUMNS, "class_name")

    def skip_reason(self, data, p):
        no_bbox = [c for c in BBOX_COLUMNS if c not in data.df]
        return f"no footprints: columns {', '.join(no_bbox)} missing" if no_bbox else "no class_name column"

    def run(self, data, p):
        th, bbox, cls = data.th, data.bbox, data.cls
        return [check_category_overlap(bbox[p.fa].astype(np.int64), cls[p.fa], bbox[p.fb].astype(np.int64),
                                       cls[p.fb], data.rng, data.hw, th.category_pairs, data.masks, p.fa, p.fb,
                                       th.category_max_ratio, p.pair)]


class NearDuplicates(Check):
    """Hashes of every row, not only the finite-parameter ones."""

    name, uses = "near_duplicates", ("images",)

    def applies(self, data, p):
        return data.fp.get()[0] is not None

    def skip_reason(self, data, p):
        return data.fp.get()[2]

    def run(self, data, p):
        hashes, sha, _ = data.fp.get()
        th, ra, rb = data.th, p.ra, p.rb
        judge, extra = _duplicate_judge(th, data.fp, data.df, ra, rb, data.reference_loader,
                                        rng_for=np.random.default_rng(th.seed))
        res = check_near_duplicates(hashes[ra], hashes[rb], th.hash_radius, _of(sha, ra), _of(sha, rb),
                                    data.ids[ra], data.ids[rb], _of(data.cls, rb), p.pair, th.worst_k,
                                    th.near_duplicates_fail, judge=judge, extra_pairs=extra)
        if sha is None:
            res = _with_note(res, " (no content hashes: exact copies not checked)")
        return [_globalise(res, ra, rb)]


class InstanceLeakage(Check):
    name, needs = "instance_leakage", INSTANCE_COLUMNS

    def run(self, data, p):
        ra, rb = p.ra, p.rb
        seen, inst, cls = data.column("instance_seen"), data.column("instance"), data.cls
        res = check_instances(cls[ra], inst[ra], cls[rb], inst[rb],
                              _as_bool(seen[rb], f"column 'instance_seen' (split {p.b!r})"),
                              _as_bool(seen[ra], f"column 'instance_seen' (split {p.a!r})"),
                              data.ids[ra], data.ids[rb], p.pair, data.th.worst_k)
        return [_globalise(res, ra, rb)]


# the order of the report
PAIR_CHECKS: tuple[Check, ...] = (DeclaredRegions(), DataRanges(), Proximity(), Footprint(), RowIntegrity(),
                                  CategoryOverlap(), NearDuplicates(), InstanceLeakage())


def run_pair_checks(data: AuditInputs, p: PairRows) -> tuple[list[CheckResult], list[Skipped]]:
    """Every check on one pair, in order: their results, and the checks skipped with why."""
    results, skipped = [], []
    for check in PAIR_CHECKS:
        if check.applies(data, p):
            results += check.run(data, p)
        elif (reason := check.skip_reason(data, p)) is not None:
            skipped.append(Skipped(check.name, p.pair, reason))
    return results, skipped


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

    def pixels(self, rows, boxes, hw):
        """footprint.row_pixels of these rows through the guard; from the loader's own `pixels`
        when it has one, with the rows it leaves out asked one by one (which records why)."""
        bulk = getattr(self.loader, "pixels", None)
        if bulk is None:
            return row_pixels(self, rows, boxes, hw)
        made, owner, lin = bulk(rows, boxes, hw)
        odd = np.flatnonzero(~made)
        if len(odd) == 0:
            return made, owner, lin
        has, o2, l2 = row_pixels(self, np.asarray(rows)[odd], np.asarray(boxes)[odd], hw)
        made = made.copy()
        made[odd] = has
        return made, np.concatenate([owner, odd[o2]]), np.concatenate([lin, l2])

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


