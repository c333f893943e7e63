"""Scoring: join a model's predictions to a dataset's manifest and measure how accuracy falls
with distance from the training region, per split / class / cell / axis value, with intervals.

Owns the predictions file format, its validation, the statistics (Wilson intervals, bootstrap
gaps), and the reports (terminal table, score.json, one CSV per curve, an HTML page).
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats
from scipy.spatial import cKDTree

from augsplit.errors import DatasetError
from augsplit.formats.table import read_table
from augsplit.io import ensure_folder, is_stdout, plain, write_output
from augsplit.manifest import UNITS
from augsplit.space.axes import AXIS_COLUMNS, BUILTIN, POSITION_AXES

PREDICTED = "predicted"  # class name or index, resolved against the manifest
PREDICTED_CLASS = "predicted_class"  # class name, never read as an index
PREDICTED_INDEX = "predicted_index"  # class index
SCORE_PREFIX = "score_"  # per-class scores of any kind (logits, margins, probabilities)
PROB_PREFIX = "prob_"  # per-class probabilities: each row must sum to one
PROB_TOLERANCE = 1e-3  # float32 softmax written with 6 digits; common practice, no source
CONFIDENCE = 0.95
N_BOOT = 2000
SEED = 20240601
MANIFEST_COLUMNS = (
    "image_id", "split", "split_index", "index", "class_name", "class_index", "cell", "cx_px", "cy_px", "x_deg", "y_deg",
    "eccentricity_deg", *AXIS_COLUMNS,
)
# positions are scored through the rendered centre (px, deg); every other catalogue axis by itself
_OWN_AXES = tuple(k for k in BUILTIN.values() if k.column and k.name not in POSITION_AXES)


# ---------------------------------------------------------------- distance and value axes


@dataclass(frozen=True)
class DistanceAxis:
    """How far a held-out image is from the training region along one kind of transform."""

    name: str
    unit: str
    columns: tuple[str, ...]
    kind: str  # "euclidean" (px), "visual_angle" (deg), "octaves" (log2 ratio), "circular" (deg)
    doc: str


def _own_distance(k) -> DistanceAxis:
    """A catalogue axis's distance: octaves for scale, the short way round for circular axes,
    the plain difference otherwise."""
    if k.distance == "octaves":
        return DistanceAxis(f"{k.name}_octaves", "oct", (k.name,), "octaves", f"|log2({k.name} / nearest training {k.name})|")
    if k.distance == "circular":
        return DistanceAxis(f"{k.name}_deg", "deg", (k.name,), "circular",
                            f"{k.name} difference to the nearest training {k.name}, the short way round")
    return DistanceAxis(k.name, k.units[0], (k.name,), "euclidean", f"{k.name} difference to the nearest training {k.name}")


DISTANCE_AXES: tuple[DistanceAxis, ...] = (
    DistanceAxis("position_px", "px", ("cx_px", "cy_px"), "euclidean",
                 "distance of the object centre to the nearest training centre"),
    DistanceAxis("position_deg", "deg", ("x_deg", "y_deg"), "visual_angle",
                 "the angle at the eye between the two centres' lines of sight (needs viewing geometry)"),
    *(_own_distance(k) for k in _OWN_AXES),
)


@dataclass(frozen=True)
class ValueAxis:
    column: str
    kind: str  # "linear", "log", "circular"


VALUE_AXES: tuple[ValueAxis, ...] = (
    ValueAxis("cx_px", "linear"), ValueAxis("cy_px", "linear"),
    ValueAxis("x_deg", "linear"), ValueAxis("y_deg", "linear"),
    ValueAxis("eccentricity_deg", "linear"), ValueAxis("polar_angle", "circular"),
    *(ValueAxis(k.name, {"octaves": "log", "circular": "circular"}.get(k.distance, "linear")) for k in _OWN_AXES),
)
PERIOD = 360.0


# ---------------------------------------------------------------- statistics


def wilson_interval(k, n, confidence: float = CONFIDENCE) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval for a binomial proportion k/n; NaN where n == 0."""
    shape = np.broadcast(np.asarray(k), np.asarray(n)).shape
    k = np.atleast_1d(np.asarray(k, dtype=float))
    n = np.atleast_1d(np.asarray(n, dtype=float))
    k, n = np.broadcast_arrays(k, n)
    z = stats.norm.ppf(0.5 + confidence / 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = k / n
        denom = 1 + z * z / n
        centre = (p + z * z / (2 * n)) / denom
        half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
        lo = np.clip(centre - half, 0.0, 1.0)
        hi = np.clip(centre + half, 0.0, 1.0)
    # at k == 0 or k == n the bound is exactly the estimate; remove float fuzz there
    lo = np.where(k == 0, 0.0, lo)
    hi = np.where(k == n, 1.0, hi)
    lo = np.where(n > 0, lo, np.nan).reshape(shape)
    hi = np.where(n > 0, hi, np.nan).reshape(shape)
    return lo, hi


def bootstrap_mean_ci(values, *, n_boot: int = N_BOOT, confidence: float = CONFIDENCE,
                      rng: np.random.Generator) -> tuple[float, float]:
    """Percentile bootstrap interval of the mean, resampling the values with replacement."""
    v = np.asarray(values, dtype=float).ravel()
    if v.size == 0:
        return (math.nan, math.nan)
    means = np.empty(n_boot)
    chunk = max(1, 4_000_000 // v.size)  # bounds memory at a few tens of MB
    for start in range(0, n_boot, chunk):
        stop = min(n_boot, start + chunk)
        idx = rng.integers(0, v.size, size=(stop - start, v.size))
        means[start:stop] = v[idx].mean(axis=1)
    a = (1 - confidence) / 2
    lo, hi = np.quantile(means, [a, 1 - a])
    return float(lo), float(hi)


def bootstrap_gap(correct_ref, correct_held, *, n_boot: int = N_BOOT, confidence: float = CONFIDENCE,
                  rng: np.random.Generator) -> tuple[float, float, float]:
    """Accuracy gap mean(ref) - mean(held) with a percentile bootstrap interval over images.

    Each split is resampled on its own (the two are independent samples). For 0/1 outcomes the
    number correct in a resample of n images is exactly Binomial(n, k/n), so drawing that count
    is the same bootstrap as resampling image indices, at a cost independent of n.
    """
    r = np.asarray(correct_ref, dtype=bool)
    h = np.asarray(correct_held, dtype=bool)
    if r.size == 0 or h.size == 0:
        return (math.nan, math.nan, math.nan)
    gap = r.mean() - h.mean()
    boot = rng.binomial(r.size, r.mean(), n_boot) / r.size - rng.binomial(h.size, h.mean(), n_boot) / h.size
    a = (1 - confidence) / 2
    lo, hi = np.quantile(boot, [a, 1 - a])
    return float(gap), float(lo), float(hi)


def expected_calibration_error(confidence, correct, n_bins: int = 10) -> float:
    """Expected calibration error: sum over equal-width confidence bins of (n_b / n) times
    |accuracy_b - mean confidence_b| (Naeini et al., 2015; Guo et al., 2017). Confidence is
    the probability the model gave its predicted class."""
    conf = np.asarray(confidence, dtype=float)
    ok = np.asarray(correct, dtype=float)
    if conf.size == 0:
        return math.nan
    b = np.clip((conf * n_bins).astype(int), 0, n_bins - 1)  # bins (i/n, (i+1)/n], 1.0 in the last
    b = np.where((conf * n_bins == b) & (b > 0), b - 1, b)
    n = np.bincount(b, minlength=n_bins)
    gap = np.abs(np.bincount(b, ok, n_bins) - np.bincount(b, conf, n_bins))
    return float(gap.sum() / conf.size) if n.sum() else math.nan


def chance_bounds(n: int, p: float, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """Accuracy range a guesser with hit rate p reaches on n images (central binomial interval)."""
    lo, hi = stats.binom.interval(confidence, n, p)
    return float(lo) / n, float(hi) / n


# ---------------------------------------------------------------- reading inputs


def read_manifest(dataset_dir) -> pd.DataFrame:
    """The image table of a dataset folder, opened and checked by augsplit.dataset (an
    unfinished or mixed folder is refused)."""
    from augsplit.dataset import open_dataset

    return manifest_of(open_dataset(dataset_dir))


def manifest_of(folder) -> pd.DataFrame:
    """The columns scoring needs, of an opened dataset folder."""
    from augsplit.dataset import read_rows
    from augsplit.dataset.layout import MANIFEST_DIR

    where = str(folder.root / MANIFEST_DIR)
    df = read_rows(folder, columns=MANIFEST_COLUMNS)
    if df.empty:
        raise DatasetError("manifest has no rows", where=where)
    df.attrs["where"] = where
    return df


def dataset_roles(folder) -> tuple[str | None, str | None]:
    """(training split, reference split) from an opened dataset's summary, when it names them.

    The reference is a test split drawn at random from the training region (kind "random"):
    its accuracy is the in-region accuracy a held-out split should be compared with, free of
    the optimism of scoring the very images the model was fitted to.
    """
    splits = (folder.summary or {}).get("splits") or {}
    train = [n for n, s in splits.items() if isinstance(s, dict) and s.get("role") == "train"]
    iid = [n for n, s in splits.items() if isinstance(s, dict) and s.get("kind") == "random" and s.get("role") != "train"]
    return (train[0] if len(train) == 1 else None), (iid[0] if len(iid) == 1 else None)


def load_predictions(path, *, probabilities: bool | None = None) -> pd.DataFrame:
    """Read a predictions table (CSV, TSV or Parquet, see augsplit.formats.table): `image_id`,
    a predicted class and/or scores.

    Class columns: `predicted` (a class name, or an index when it is not a name),
    `predicted_class` (always a name) or `predicted_index` (always an index). Per-class
    columns `score_<class>` hold any scores; `prob_<class>` hold probabilities (each row
    must then sum to one, as it must for `score_` columns when `probabilities=True`).
    Classes are resolved against the dataset later, in `score`.
    """
    p = Path(path)
    where = str(p)
    # class labels stay text so digit-named classes are not read as indices
    df = read_table(p, text=("image_id", PREDICTED, PREDICTED_CLASS), what="predictions file")
    df.columns = [str(c).strip() for c in df.columns]
    if "image_id" not in df.columns:
        raise DatasetError(f"no 'image_id' column (columns: {', '.join(df.columns[:8])})", where=where)
    ids = df["image_id"]
    bad = ids.isna() | (ids.astype(str).str.strip() == "")
    if bad.any():
        raise DatasetError(f"{int(bad.sum())} row(s) have no image_id (first at row {_row(bad)})", where=where)
    df["image_id"] = ids.astype(str).str.strip()

    score_cols = [c for c in df.columns if c.startswith(SCORE_PREFIX)]
    prob_cols = [c for c in df.columns if c.startswith(PROB_PREFIX)]
    if score_cols and prob_cols:
        raise DatasetError("has both score_<class> and prob_<class> columns; keep one kind", where=where)
    class_cols = [c for c in (PREDICTED, PREDICTED_CLASS, PREDICTED_INDEX) if c in df.columns]
    if len(class_cols) > 1:
        raise DatasetError(f"has several predicted-class columns ({', '.join(class_cols)}); keep one", where=where)
    if not class_cols and not (score_cols or prob_cols):
        raise DatasetError("needs a 'predicted' column or per-class score_<class> / prob_<class> columns",
                           where=where)
    dup = df["image_id"].duplicated(keep=False)
    if dup.any():
        names = list(dict.fromkeys(df.loc[dup, "image_id"]))
        raise DatasetError(f"{len(names)} image id(s) appear more than once (e.g. {_few(names)})", where=where)
    if class_cols:
        col = class_cols[0]
        missing = df[col].isna() | (df[col].astype(str).str.strip() == "")
        if missing.any():
            raise DatasetError(f"{int(missing.sum())} row(s) have no {col} (first at row {_row(missing)})",
                               where=where)
        if col == PREDICTED_INDEX:
            idx = pd.to_numeric(df[col], errors="coerce")
            bad = idx.isna() | (idx != np.round(idx))
            if bad.any():
                raise DatasetError(f"{col} must hold whole numbers (first bad at row {_row(bad)})", where=where)
            df[col] = idx.astype(np.int64)
        else:
            df[col] = df[col].astype(str).str.strip()
    cols = prob_cols or score_cols
    if cols:
        vals = df[cols].apply(pd.to_numeric, errors="coerce")
        finite = np.isfinite(vals.to_numpy(dtype=float))
        if not finite.all():
            r, c = np.argwhere(~finite)[0]
            raise DatasetError(f"score column {cols[c]} is not a finite number at row {r + 1}", where=where)
        df[cols] = vals.astype(float)
    claimed = bool(prob_cols) or bool(probabilities)
    if claimed and cols:
        m = df[cols].to_numpy(dtype=float)
        sums = m.sum(axis=1)
        off = np.abs(sums - 1.0) > PROB_TOLERANCE
        neg = (m < -1e-9).any(axis=1) | (m > 1 + 1e-9).any(axis=1)
        if neg.any():
            raise DatasetError(f"{int(neg.sum())} row(s) of probabilities hold values outside [0, 1] "
                               f"(first at row {_row(neg)})", where=where)
        if off.any():
            i = int(np.flatnonzero(off)[0])
            raise DatasetError(f"{int(off.sum())} row(s) of probabilities do not sum to one "
                               f"(row {i + 1} sums to {sums[i]:.6g}; tolerance {PROB_TOLERANCE:g})", where=where)
    df.attrs.update(where=where, score_columns=tuple(cols), probabilities=claimed,
                    class_column=class_cols[0] if class_cols else None)
    return df


# ---------------------------------------------------------------- the result


@dataclass(frozen=True)
class ScoreResult:
    """Everything `score` measured. Tables are pandas DataFrames; `rows` has one row per image."""

    dataset: str
    predictions: str
    train_split: str
    reference_split: str
    classes: tuple[str, ...]
    topk: tuple[int, ...]
    n_images: int
    n_scored: int
    coverage: float
    rows: pd.DataFrame
    by_split: pd.DataFrame
    by_class: pd.DataFrame
    by_cell: pd.DataFrame
    distance: pd.DataFrame
    by_value: pd.DataFrame
    train_ranges: dict
    gaps: pd.DataFrame
    verdicts: tuple[str, ...]
    notes: tuple[str, ...] = field(default=())
    confidence: float = CONFIDENCE
    n_boot: int = N_BOOT
    seed: int = SEED

    @property
    def heldout_splits(self) -> tuple[str, ...]:
        return tuple(s for s in self.by_split["split"] if s != self.train_split)

    def tables(self) -> dict[str, pd.DataFrame]:
        """Every curve/table by the file stem it is written under."""
        return {"by_split": self.by_split, "by_class": self.by_class, "by_cell": self.by_cell,
                "distance": self.distance, "by_value": self.by_value, "gaps": self.gaps,
                "per_image": self.rows}

    def to_json(self) -> dict:
        return {
            "dataset": self.dataset, "predictions": self.predictions, "train_split": self.train_split,
            "reference_split": self.reference_split, "classes": list(self.classes), "topk": list(self.topk),
            "n_images": self.n_images, "n_scored": self.n_scored, "coverage": self.coverage,
            "confidence": self.confidence, "interval": "Wilson score", "bootstrap": {"n": self.n_boot, "seed": self.seed},
            "verdicts": list(self.verdicts), "notes": list(self.notes),
            "train_ranges": self.train_ranges,
            **{name: _records(t) for name, t in self.tables().items() if name != "per_image"},
        }


# ---------------------------------------------------------------- scoring


def score(manifest: pd.DataFrame, predictions: pd.DataFrame, train_split: str = "train", *,
          reference_split: str | None = None, allow_partial: bool = False, topk: tuple[int, ...] = (2, 5),
          n_bins: int = 8, n_value_bins: int = 16, n_boot: int = N_BOOT, seed: int = SEED,
          confidence: float = CONFIDENCE) -> ScoreResult:
    """Join predictions to the manifest and measure accuracy against distance from training.

    `train_split` defines the training region (distances are measured from its rows);
    `reference_split` (default: the training split) is the in-region accuracy each held-out
    split's is compared with. Refuses to score a subset of the manifest unless `allow_partial`.
    """
    where = predictions.attrs.get("where", "predictions")
    mwhere = manifest.attrs.get("where", "manifest")
    reference_split = reference_split or train_split
    present = list(pd.unique(manifest["split"].astype(str)))  # the manifest's (spec) order
    splits = sorted(present, key=lambda s: (s != train_split, present.index(s)))
    for name, what in ((train_split, "training"), (reference_split, "reference")):
        if name not in splits:
            raise DatasetError(f"{what} split {name!r} is not in the dataset (splits: {', '.join(splits)})",
                               where=mwhere)
    if manifest["image_id"].duplicated().any():
        raise DatasetError("manifest has duplicate image ids", where=mwhere)
    if predictions.empty:
        raise DatasetError("predictions file has no rows", where=where)
    if predictions["image_id"].duplicated().any():
        dups = list(dict.fromkeys(predictions.loc[predictions["image_id"].duplicated(), "image_id"]))
        raise DatasetError(f"{len(dups)} image id(s) appear more than once (e.g. {_few(dups)})", where=where)

    class_map = (manifest[["class_index", "class_name"]].drop_duplicates().sort_values("class_index"))
    if class_map["class_index"].duplicated().any() or class_map["class_name"].duplicated().any():
        raise DatasetError("manifest maps class names to indices inconsistently", where=mwhere)
    classes = tuple(str(c) for c in class_map["class_name"])
    index_of_name = dict(zip(classes, class_map["class_index"].astype(int)))
    indices = np.asarray(class_map["class_index"], dtype=int)

    known = set(manifest["image_id"].astype(str))
    pid = predictions["image_id"].astype(str)
    unknown = ~pid.isin(known)
    if unknown.any():
        raise DatasetError(f"{int(unknown.sum())} prediction id(s) are not in the manifest "
                           f"(e.g. {_few(list(pid[unknown]))})", where=where)

    pred_idx, score_mat = _resolve_classes(predictions, classes, index_of_name, indices, where)
    n_images = len(manifest)
    n_scored = len(predictions)
    coverage = n_scored / n_images
    notes: list[str] = []
    if n_scored < n_images:
        missing = manifest.loc[~manifest["image_id"].astype(str).isin(set(pid)), "image_id"].astype(str)
        msg = (f"predictions cover {n_scored} of {n_images} images ({coverage:.1%}); "
               f"{len(missing)} missing (e.g. {_few(list(missing))})")
        if not allow_partial:
            raise DatasetError(msg, where=where,
                               hint="pass allow_partial=True / --allow-partial to score the covered images only")
        notes.append(msg)

    # one row per scored image, in manifest order
    pred = pd.DataFrame({"image_id": pid.to_numpy(), "predicted_index": pred_idx})
    rows = manifest.merge(pred, on="image_id", how="inner", validate="one_to_one")  # keeps manifest order
    name_of_index = dict(zip(indices, classes))
    rows["predicted_class"] = [name_of_index[i] for i in rows["predicted_index"]]
    rows["correct"] = rows["predicted_index"].to_numpy() == rows["class_index"].to_numpy(dtype=int)

    ks: tuple[int, ...] = ()
    if score_mat is not None:
        ks = tuple(sorted({int(k) for k in topk if 1 < int(k) < len(classes)}))
        sm = score_mat[pd.Index(pid).get_indexer(rows["image_id"])]
        truth_col = np.searchsorted(indices, rows["class_index"].to_numpy(dtype=int))
        true_score = sm[np.arange(len(rows)), truth_col]
        # ties count against the true class, so a constant scorer gets no credit
        rank = (sm > true_score[:, None]).sum(1) + (sm == true_score[:, None]).sum(1) - 1
        for k in ks:
            rows[f"top{k}_correct"] = rank < k
        disagree = int((indices[sm.argmax(1)] != rows["predicted_index"].to_numpy()).sum())
        if disagree and predictions.attrs.get("class_column"):
            notes.append(f"{disagree} row(s) predict a class other than their highest score; "
                         "accuracy uses the predicted column, top-k the scores")

    probs = score_mat is not None and bool(predictions.attrs.get("probabilities"))
    if probs:
        rows["confidence"] = sm[np.arange(len(rows)), np.searchsorted(indices, rows["predicted_index"].to_numpy())]
    dist_axes = _distance_columns(manifest, rows, train_split)
    rows["split"] = pd.Categorical(rows["split"].astype(str), categories=splits, ordered=True)
    by_split = _accuracy_table(rows, ["split"], ks, confidence)
    by_split = _add_coverage(by_split, manifest, rows)
    by_split = _add_chance(by_split, rows)
    if probs:
        cal = {s: expected_calibration_error(g["confidence"].to_numpy(), g["correct"].to_numpy())
               for s, g in rows.groupby("split", observed=True)}
        by_split["mean_confidence"] = by_split["split"].map(
            rows.groupby("split", observed=True)["confidence"].mean()).astype(float)
        by_split["ece"] = by_split["split"].map(cal).astype(float)
    by_class = _accuracy_table(rows, ["split", "class_name"], ks, confidence)
    by_cell = _accuracy_table(rows if "cell" in rows.columns else rows.assign(cell=-1), ["split", "cell"], ks, confidence)
    distance = _distance_table(rows, manifest, dist_axes, train_split, n_bins, confidence)
    by_value, train_ranges = _value_table(manifest, rows, train_split, n_value_bins, confidence)
    gaps = _gap_table(rows, splits, train_split, reference_split, n_boot, seed, confidence)
    verdicts = tuple(_verdict(r, by_split) for _, r in gaps.iterrows())
    for t in (by_split, by_class, by_cell, distance, by_value):
        t["split"] = t["split"].astype(str)
    rows["split"] = rows["split"].astype(str)
    return ScoreResult(
        dataset=mwhere, predictions=where, train_split=train_split, reference_split=reference_split,
        classes=classes, topk=ks, n_images=n_images, n_scored=n_scored, coverage=coverage, rows=rows,
        by_split=by_split, by_class=by_class, by_cell=by_cell, distance=distance, by_value=by_value,
        train_ranges=train_ranges, gaps=gaps, verdicts=verdicts, notes=tuple(notes),
        confidence=confidence, n_boot=n_boot, seed=seed)


def _resolve_classes(pred: pd.DataFrame, classes, index_of_name, indices, where):
    """Predicted class index per row, and the score matrix in class-index order (or None)."""
    names = set(classes)
    index_set = set(int(i) for i in indices)
    cols = list(pred.attrs.get("score_columns") or [c for c in pred.columns if c.startswith((SCORE_PREFIX, PROB_PREFIX))])
    score_mat = None
    if cols:
        prefix = PROB_PREFIX if cols[0].startswith(PROB_PREFIX) else SCORE_PREFIX
        if not all(c.startswith(prefix) for c in cols):
            raise DatasetError("has both score_<class> and prob_<class> columns; keep one kind", where=where)
        labels = [c[len(prefix):] for c in cols]
        col_idx = _labels_to_indices(labels, names, index_set, index_of_name, where,
                                     what=f"{prefix}<class> column(s)")
        lacking = sorted(index_set - set(col_idx))
        if lacking:
            lack_names = [classes[int(np.searchsorted(indices, i))] for i in lacking]
            raise DatasetError(f"scores given for {len(set(col_idx))} of {len(classes)} classes; "
                               f"no {prefix}<class> column for {_few(lack_names)}", where=where)
        if len(set(col_idx)) != len(col_idx):
            raise DatasetError(f"two {prefix}<class> columns name the same class", where=where)
        order = np.argsort(col_idx)
        score_mat = pred[cols].to_numpy(dtype=float)[:, order]
    col = pred.attrs.get("class_column") or next(
        (c for c in (PREDICTED, PREDICTED_CLASS, PREDICTED_INDEX) if c in pred.columns), None)
    if col is None:
        return indices[score_mat.argmax(1)], score_mat
    values = pred[col]
    if col == PREDICTED_INDEX:
        idx = values.to_numpy(dtype=np.int64)
        bad = ~np.isin(idx, indices)
        if bad.any():
            raise DatasetError(f"{int(bad.sum())} prediction(s) name class indices the dataset does not have "
                               f"({_few(sorted(set(idx[bad].tolist())))}; classes are {_few(sorted(index_set))})",
                               where=where)
        return idx, score_mat
    labels = values.astype(str).tolist()
    if col == PREDICTED_CLASS:
        return np.asarray(_labels_to_indices(labels, names, set(), index_of_name, where, what="predicted class(es)")), score_mat
    return np.asarray(_labels_to_indices(labels, names, index_set, index_of_name, where, what="predicted class(es)")), score_mat


def _labels_to_indices(labels, names, index_set, index_of_name, where, what):
    """Labels are class names when all are names; else indices when all are whole numbers."""
    uniq = list(dict.fromkeys(labels))
    as_int = {}
    for u in uniq:
        try:
            f = float(u)
            if f == int(f):
                as_int[u] = int(f)
        except (ValueError, OverflowError):
            pass
    if all(u in names for u in uniq):
        ambiguous = [u for u in uniq if u in as_int and as_int[u] in index_set and index_of_name[u] != as_int[u]]
        if ambiguous:
            raise DatasetError(f"{what} {_few(ambiguous)} are both class names and other classes' indices",
                               where=where, hint="name the column predicted_class or predicted_index")
        return [int(index_of_name[u]) for u in labels]
    if index_set and all(u in as_int for u in uniq):
        bad = sorted({as_int[u] for u in uniq if as_int[u] not in index_set})
        if bad:
            raise DatasetError(f"{what} use class indices the dataset does not have ({_few(bad)}; "
                               f"it has {_few(sorted(index_set))})", where=where)
        return [as_int[u] for u in labels]
    bad = [u for u in uniq if u not in names]
    raise DatasetError(f"{what} name {len(bad)} class(es) the dataset does not have ({_few(bad)}; "
                       f"it has {_few(sorted(names))})", where=where)


def _accuracy_table(rows: pd.DataFrame, by: list[str], ks, confidence) -> pd.DataFrame:
    agg = {"n": ("correct", "size"), "k": ("correct", "sum")}
    for k in ks:
        agg[f"k_top{k}"] = (f"top{k}_correct", "sum")
    t = rows.groupby(by, sort=True, observed=True).agg(**agg).reset_index()
    t["n"] = t["n"].astype(int)
    t["k"] = t["k"].astype(int)
    t["accuracy"] = t["k"] / t["n"]
    t["ci_lo"], t["ci_hi"] = wilson_interval(t["k"], t["n"], confidence)
    for k in ks:
        kk = t.pop(f"k_top{k}").astype(int)
        t[f"top{k}"] = kk / t["n"]
        t[f"top{k}_lo"], t[f"top{k}_hi"] = wilson_interval(kk, t["n"], confidence)
    return t


def _add_coverage(t: pd.DataFrame, manifest: pd.DataFrame, rows: pd.DataFrame) -> pd.DataFrame:
    total = manifest.groupby("split").size()
    t = t.set_index("split")
    t.insert(0, "n_images", total.reindex(t.index).astype(int))
    t.insert(1, "coverage", t["n"] / t["n_images"])
    return t.reset_index()


def _add_chance(t: pd.DataFrame, rows: pd.DataFrame) -> pd.DataFrame:
    # the best constant guess scores the majority class's share of the split
    major = rows.groupby("split")["class_index"].agg(lambda s: s.value_counts().iloc[0] / len(s))
    t["chance"] = t["split"].map(major).astype(float)
    return t


def _distance_columns(manifest: pd.DataFrame, rows: pd.DataFrame, train_split: str) -> list[DistanceAxis]:
    """Fill rows['dist_<axis>'] for every axis the dataset varies; return those axes."""
    train = manifest[manifest["split"] == train_split]
    used = []
    for ax in DISTANCE_AXES:
        if not all(c in manifest.columns for c in ax.columns):
            continue
        allv = manifest[list(ax.columns)].to_numpy(dtype=float)
        if not np.isfinite(allv).all() or np.all(np.ptp(allv, axis=0) == 0):
            continue
        tr = train[list(ax.columns)].to_numpy(dtype=float)
        q = rows[list(ax.columns)].to_numpy(dtype=float)
        d = nearest_distance(tr, q, ax.kind)
        d[(rows["split"] == train_split).to_numpy()] = 0.0
        rows[f"dist_{ax.name}"] = d
        used.append(ax)
    return used


def nearest_distance(train: np.ndarray, query: np.ndarray, kind: str) -> np.ndarray:
    """Distance from each query row to the nearest training row on one axis kind.

    euclidean: plain distance over the columns; octaves: |log2 ratio|; circular: degrees the
    short way round (a KD-tree on the circle via periodic boxes); visual_angle: columns are the
    horizontal and vertical visual angles atan(offset / D) of points on a flat screen, and the
    distance is the exact angle at the eye between two of them (see `_sight_lines`).
    """
    train = np.asarray(train, dtype=float).reshape(len(train), -1)
    query = np.asarray(query, dtype=float).reshape(len(query), -1)
    if len(query) == 0:
        return np.zeros(0)
    if kind == "octaves":
        tree = cKDTree(np.log2(train))
        d, _ = tree.query(np.log2(query), k=1)
    elif kind == "circular":
        tree = cKDTree(_wrap(train), boxsize=PERIOD)
        d, _ = tree.query(_wrap(query), k=1)
    elif kind == "visual_angle":
        tree = cKDTree(_sight_lines(train))
        chord, _ = tree.query(_sight_lines(query), k=1)
        d = _chord_to_deg(chord)
    else:
        tree = cKDTree(train)
        d, _ = tree.query(query, k=1)
    return np.asarray(d, dtype=float)


def _sight_lines(xy_deg: np.ndarray) -> np.ndarray:
    """Unit vectors from the eye to screen points given as (atan(dx / D), atan(dy / D)) in deg.

    The point sits at (tan x, tan y, 1) * D; the chord between two unit vectors grows with
    the angle between them (chord = 2 sin(angle / 2)), so the nearest chord is the nearest angle.
    """
    t = np.tan(np.radians(xy_deg))
    v = np.column_stack([t[:, 0], t[:, 1], np.ones(len(t))])
    return v / np.linalg.norm(v, axis=1, keepdims=True)


def _chord_to_deg(chord) -> np.ndarray:
    return np.degrees(2.0 * np.arcsin(np.clip(np.asarray(chord, dtype=float) / 2.0, 0.0, 1.0)))


def _wrap(v: np.ndarray) -> np.ndarray:
    w = np.mod(v, PERIOD)
    return np.where(w >= PERIOD, 0.0, w)  # np.mod(-1e-20, 360) is 360.0


def _distance_table(rows, manifest, axes, train_split, n_bins, confidence) -> pd.DataFrame:
    out = []
    train = manifest[manifest["split"] == train_split]
    for ax in axes:
        col = f"dist_{ax.name}"
        spacing = train_spacing(train[list(ax.columns)].to_numpy(dtype=float), ax.kind)
        for split, g in rows.groupby("split", sort=True, observed=True):
            if split == train_split:
                continue
            d = g[col].to_numpy(dtype=float)
            c = g["correct"].to_numpy(dtype=bool)
            edges = np.unique(np.quantile(d, np.linspace(0, 1, n_bins + 1)))
            b = np.searchsorted(edges[1:-1], d, side="right") if edges.size > 1 else np.zeros(d.size, int)
            beyond = bool(np.median(d) > spacing)
            for i in np.unique(b):
                m = b == i
                out.append({"axis": ax.name, "unit": ax.unit, "split": split, "bin": int(i),
                            "lo": float(edges[i]), "hi": float(edges[min(i + 1, edges.size - 1)]),
                            "mean_distance": float(d[m].mean()), "n": int(m.sum()), "k": int(c[m].sum()),
                            "train_spacing": spacing, "held_out_along": beyond})
    cols = ["axis", "unit", "split", "bin", "lo", "hi", "mean_distance", "n", "k", "train_spacing", "held_out_along"]
    t = pd.DataFrame(out, columns=cols)
    t["accuracy"] = t["k"] / t["n"] if len(t) else []
    t["ci_lo"], t["ci_hi"] = wilson_interval(t["k"].to_numpy(), t["n"].to_numpy(), confidence)
    return t


def train_spacing(train: np.ndarray, kind: str) -> float:
    """How far apart training images lie on an axis: 95th percentile of each one's distance to
    its nearest other training image. A held-out split whose median distance exceeds it lies
    beyond the training region on that axis (common practice, no source)."""
    train = np.asarray(train, dtype=float).reshape(len(train), -1)
    if len(train) < 2:
        return 0.0
    if kind == "octaves":
        pts, box = np.log2(train), None
    elif kind == "circular":
        pts, box = _wrap(train), PERIOD
    elif kind == "visual_angle":
        pts, box = _sight_lines(train), None
    else:
        pts, box = train, None
    d, _ = cKDTree(pts, boxsize=box).query(pts, k=2)
    gap = d[:, 1] if kind != "visual_angle" else _chord_to_deg(d[:, 1])
    return float(np.quantile(gap, 0.95))


def _value_table(manifest, rows, train_split, n_bins, confidence):
    """Accuracy against each varied axis value, per split, and the training rows' occupied ranges.

    Circular axes are binned along the shortest arc that holds every value, and reported in
    signed degrees when that arc crosses 0 (so [350, 10] reads as [-10, 10])."""
    out, ranges = [], {}
    train = manifest[manifest["split"] == train_split]
    for ax in VALUE_AXES:
        if ax.column not in manifest.columns:
            continue
        allv = manifest[ax.column].to_numpy(dtype=float)
        if not np.isfinite(allv).all() or np.ptp(allv) == 0:
            continue
        unit = UNITS.get(ax.column, "")
        tv = train[ax.column].to_numpy(dtype=float)
        if ax.kind == "circular":
            # the shortest arc holding every value, in signed degrees when it crosses 0
            start = _arc_start(allv)
            shown = start - PERIOD if start >= PERIOD / 2 else start
            to_u = lambda v, s=start, o=shown: o + np.mod(np.asarray(v, float) - s, PERIOD)  # noqa: E731
        elif ax.kind == "log":
            to_u = np.log2
        else:
            to_u = lambda v: np.asarray(v, float)  # noqa: E731
        from_u = (lambda u: np.exp2(u)) if ax.kind == "log" else (lambda u: u)
        ua = to_u(allv)
        lo, hi = float(ua.min()), float(ua.max())
        edges = np.linspace(lo, hi, n_bins + 1)
        ivals = [[float(from_u(a)), float(from_u(b))] for a, b in _occupied(to_u(tv), hi - lo)]
        ranges[ax.column] = {"unit": unit, "kind": ax.kind, "intervals": ivals}
        ur = to_u(rows[ax.column].to_numpy(dtype=float))
        b = np.clip(np.searchsorted(edges, ur, side="right") - 1, 0, n_bins - 1)
        tb = np.bincount(np.clip(np.searchsorted(edges, to_u(tv), side="right") - 1, 0, n_bins - 1), minlength=n_bins)
        frame = pd.DataFrame({"split": rows["split"].to_numpy(), "bin": b, "correct": rows["correct"].to_numpy()})
        agg = frame.groupby(["split", "bin"]).agg(n=("correct", "size"), k=("correct", "sum")).reset_index()
        for r in agg.itertuples(index=False):
            a, z = from_u(edges[r.bin]), from_u(edges[r.bin + 1])
            out.append({"axis": ax.column, "unit": unit, "split": r.split, "bin": int(r.bin),
                        "lo": float(a), "hi": float(z), "centre": float(from_u((edges[r.bin] + edges[r.bin + 1]) / 2)),
                        "n": int(r.n), "k": int(r.k), "n_train_in_bin": int(tb[r.bin])})
    t = pd.DataFrame(out, columns=["axis", "unit", "split", "bin", "lo", "hi", "centre", "n", "k", "n_train_in_bin"])
    t["accuracy"] = t["k"] / t["n"] if len(t) else []
    t["ci_lo"], t["ci_hi"] = wilson_interval(t["k"].to_numpy(), t["n"].to_numpy(), confidence)
    return t, ranges


def _arc_start(v: np.ndarray) -> float:
    """Start of the shortest arc holding every angle: just after the widest empty gap."""
    s = np.sort(_wrap(v))
    gaps = np.diff(np.concatenate([s, [s[0] + PERIOD]]))
    i = int(np.argmax(gaps))
    return float(s[(i + 1) % s.size]) if gaps[i] > 0 else 0.0


def _occupied(u: np.ndarray, span: float) -> list[tuple[float, float]]:
    """Intervals the training values fill: split where a gap exceeds 5% of the span.

    The 5% threshold is common practice, no source; it separates held-out bands from the
    spacing of a few hundred uniformly drawn training values.
    """
    if u.size == 0:
        return []
    s = np.sort(u)
    cut = np.flatnonzero(np.diff(s) > 0.05 * span)
    starts = np.concatenate([[0], cut + 1])
    stops = np.concatenate([cut, [s.size - 1]])
    return [(float(s[a]), float(s[b])) for a, b in zip(starts, stops)]


def _gap_table(rows, splits, train_split, reference_split, n_boot, seed, confidence) -> pd.DataFrame:
    ref = rows.loc[rows["split"] == reference_split, "correct"].to_numpy(dtype=bool)
    held = [s for s in splits if s not in (train_split, reference_split)]
    streams = np.random.SeedSequence(seed).spawn(max(1, len(splits)))
    out = []
    for s in held:
        h = rows.loc[rows["split"] == s, "correct"].to_numpy(dtype=bool)
        rng = np.random.default_rng(streams[splits.index(s)])
        gap, lo, hi = bootstrap_gap(ref, h, n_boot=n_boot, confidence=confidence, rng=rng)
        out.append({"split": s, "reference": reference_split,
                    "reference_accuracy": float(ref.mean()) if ref.size else math.nan,
                    "accuracy": float(h.mean()) if h.size else math.nan,
                    "gap": gap, "gap_lo": lo, "gap_hi": hi, "n_reference": int(ref.size), "n": int(h.size)})
    return pd.DataFrame(out, columns=["split", "reference", "reference_accuracy", "accuracy", "gap", "gap_lo",
                                      "gap_hi", "n_reference", "n"])


def _verdict(gap_row, by_split: pd.DataFrame) -> str:
    s = gap_row["split"]
    if not np.isfinite(gap_row["gap"]):
        return f"{s}: no predictions for this split or its reference"
    r = by_split.set_index("split").loc[s]
    head = (f"{s}: accuracy {r['accuracy']:.3f} [{r['ci_lo']:.3f}, {r['ci_hi']:.3f}] vs "
            f"{gap_row['reference']} {gap_row['reference_accuracy']:.3f}; gap {gap_row['gap']:+.3f} "
            f"[{gap_row['gap_lo']:+.3f}, {gap_row['gap_hi']:+.3f}]")
    if r["ci_lo"] <= r["chance"]:
        what = f"not distinguishable from chance ({r['chance']:.3f})"
    elif gap_row["gap_lo"] > 0:
        what = "above chance but below the training region: partial transfer"
    else:
        what = "no measurable drop from the training region"
    return f"{head} -- {what}"


# ---------------------------------------------------------------- comparing two results


def compare(a: ScoreResult, b: ScoreResult, labels: tuple[str, str] = ("a", "b"),
            confidence: float = CONFIDENCE) -> pd.DataFrame:
    """Side-by-side accuracy per split of two prediction files on the same images.

    The paired difference is tested with the exact McNemar test (McNemar, 1947): a binomial
    test of the discordant pairs, from scipy.stats.binomtest.
    """
    if a.dataset != b.dataset and set(a.rows["image_id"]) != set(b.rows["image_id"]):
        raise DatasetError("the two prediction files score different datasets", where=b.predictions)
    la, lb = labels
    m = a.rows[["image_id", "split", "correct"]].merge(
        b.rows[["image_id", "correct"]], on="image_id", suffixes=(f"_{la}", f"_{lb}"))
    out = []
    for split, g in m.groupby("split", sort=False):
        ca, cb = g[f"correct_{la}"].to_numpy(bool), g[f"correct_{lb}"].to_numpy(bool)
        only_a, only_b = int((ca & ~cb).sum()), int((~ca & cb).sum())
        p = stats.binomtest(only_a, only_a + only_b, 0.5).pvalue if only_a + only_b else 1.0
        out.append({"split": split, "n": len(g), f"accuracy_{la}": ca.mean(), f"accuracy_{lb}": cb.mean(),
                    "difference": ca.mean() - cb.mean(), f"only_{la}_correct": only_a,
                    f"only_{lb}_correct": only_b, "mcnemar_p": float(p)})
    t = pd.DataFrame(out)
    order = {s: i for i, s in enumerate(a.by_split["split"])}
    return t.sort_values("split", key=lambda s: s.map(order)).reset_index(drop=True)


# ---------------------------------------------------------------- reports


def format_table(result: ScoreResult, label: str | None = None) -> str:
    """The terminal report: accuracy per split, the gaps, and the verdicts."""
    head = f"{label}: " if label else ""
    lines = [f"{head}{result.predictions}  ({result.n_scored}/{result.n_images} images, "
             f"{len(result.classes)} classes, {result.confidence:.0%} Wilson intervals)"]
    cal = "ece" in result.by_split.columns
    cols = ["split", "n", "accuracy", "interval", "chance"] + [f"top{k}" for k in result.topk] + (["ECE"] if cal else [])
    body = []
    for _, r in result.by_split.iterrows():
        body.append([r["split"], str(r["n"]), f"{r['accuracy']:.3f}", f"[{r['ci_lo']:.3f}, {r['ci_hi']:.3f}]",
                     f"{r['chance']:.3f}"] + [f"{r[f'top{k}']:.3f}" for k in result.topk]
                    + ([f"{r['ece']:.3f}"] if cal else []))
    lines += _fixed_width(cols, body)
    if len(result.distance):
        lines.append("accuracy against distance from the training region (axes a split lies beyond):")
        dcols = ["axis", "split", "distance", "n", "accuracy", "interval"]
        shown = result.distance[result.distance["held_out_along"]]
        dbody = [[r["axis"], r["split"], f"{r['lo']:.3g}-{r['hi']:.3g} {r['unit']}", str(r["n"]),
                  f"{r['accuracy']:.3f}", f"[{r['ci_lo']:.3f}, {r['ci_hi']:.3f}]"]
                 for _, r in shown.iterrows()]
        lines += _fixed_width(dcols, dbody)
        hidden = sorted(set(result.distance["axis"]) - set(shown["axis"]))
        if hidden:
            lines.append(f"  (no split lies beyond the training images on {', '.join(hidden)}; see distance.csv)")
    lines += [f"  {v}" for v in result.verdicts]
    lines += [f"  note: {n}" for n in result.notes]
    return "\n".join(lines)


def _fixed_width(cols, body) -> list[str]:
    w = [max(len(c), *(len(r[i]) for r in body)) if body else len(c) for i, c in enumerate(cols)]
    fmt = lambda r: "  " + "  ".join(v.ljust(w[i]) for i, v in enumerate(r))  # noqa: E731
    return [fmt(cols)] + [fmt(r) for r in body]


def write_outputs(results: list[tuple[str, ScoreResult]], out_dir, *, title: str = "augsplit score",
                  intro_html: str = "") -> dict[str, Path]:
    """Write score.json, one CSV per table (prefixed by label when several), and report.html.
    `out_dir` "-" prints score.json to standard output and writes nothing else."""
    written: dict[str, Path] = {}
    several = len(results) > 1
    doc = {label: r.to_json() for label, r in results} if several else results[0][1].to_json()
    if several:
        doc = {"models": doc, "comparison": _records(compare(results[0][1], results[1][1],
                                                              (results[0][0], results[1][0])))}
    text = json.dumps(plain(doc), indent=2, allow_nan=False)
    if is_stdout(out_dir):
        return {"score.json": write_output(out_dir, text + "\n")}
    out = ensure_folder(out_dir)
    written["score.json"] = write_output(out / "score.json", text)
    for label, r in results:
        for name, t in r.tables().items():
            stem = f"{label}_{name}" if several else name
            written[f"{stem}.csv"] = write_output(out / f"{stem}.csv", t.to_csv(index=False))
    if several:
        written["comparison.csv"] = write_output(
            out / "comparison.csv", compare(results[0][1], results[1][1], (results[0][0], results[1][0])).to_csv(index=False))
    written["report.html"] = write_output(out / "report.html", render_html(results, title=title, intro_html=intro_html))
    return written


def run_score(dataset_dir, predictions_path, out_dir, compare=None, *, train_split: str | None = None,
              reference_split: str | None = None, allow_partial: bool = False, probabilities: bool | None = None,
              labels: tuple[str, str] | None = None, echo: bool = True) -> ScoreResult:
    """Score one predictions file (and optionally a second, side by side); write every report.

    The training split defaults to the one the dataset's summary names (else "train"); the
    reference split to its i.i.d. test split from the training region, if it has exactly one
    (else the training split). Returns the first file's result. `augsplit score` calls this.
    """
    from augsplit.dataset import open_dataset

    folder = open_dataset(dataset_dir)
    manifest = manifest_of(folder)
    role_train, role_ref = dataset_roles(folder)
    train_split = train_split or role_train or "train"
    reference_split = reference_split or role_ref
    paths = [Path(predictions_path)] + ([Path(compare)] if compare else [])
    if labels is None:
        labels = tuple(_label(p, i) for i, p in enumerate(paths))
        if len(set(labels)) < len(labels):
            labels = ("a", "b")
    results = []
    for label, p in zip(labels, paths):
        r = score(manifest, load_predictions(p, probabilities=probabilities), train_split,
                  reference_split=reference_split, allow_partial=allow_partial)
        results.append((label, r))
    write_outputs(results, out_dir)
    if echo:
        print("\n\n".join(format_table(r, label if len(results) > 1 else None) for label, r in results))
        if len(results) > 1:
            print(compare_table_text(results))
    return results[0][1]


def compare_table_text(results) -> str:
    (la, a), (lb, b) = results[:2]
    t = compare(a, b, (la, lb))
    cols = ["split", "n", la, lb, "difference", "McNemar p"]
    body = [[r["split"], str(r["n"]), f"{r[f'accuracy_{la}']:.3f}", f"{r[f'accuracy_{lb}']:.3f}",
             f"{r['difference']:+.3f}", f"{r['mcnemar_p']:.3g}"] for _, r in t.iterrows()]
    return "\n".join(["side by side:"] + _fixed_width(cols, body))


def _label(p: Path, i: int) -> str:
    stem = p.stem
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in stem) or f"model{i + 1}"


# ---------------------------------------------------------------- HTML and plots


PAGE_STYLE = ("body{font-family:sans-serif;max-width:1100px;margin:auto;padding:1em}"
              "table{border-collapse:collapse;font-size:13px}td,th{border:1px solid #ccc;padding:2px 6px}"
              "img{max-width:100%}.verdict{font-family:monospace}")


def html_page(title: str, body: list[str]) -> str:
    """A self-contained HTML page (plots are embedded PNGs) around the given body parts."""
    esc = html.escape
    return "\n".join([f"<!doctype html><html><head><meta charset='utf-8'><title>{esc(title)}</title>",
                      f"<style>{PAGE_STYLE}</style></head><body>", f"<h1>{esc(title)}</h1>", *body,
                      "</body></html>"])


def render_html(results: list[tuple[str, ScoreResult]], *, title: str = "augsplit score", intro_html: str = "") -> str:
    """One self-contained page: verdicts, split accuracies, curves against distance and value."""
    return html_page(title, [intro_html, *render_sections(results)])


def render_sections(results: list[tuple[str, ScoreResult]], level: int = 2) -> list[str]:
    """The body of a score report for one or two prediction files, as HTML fragments."""
    esc = html.escape
    h = f"h{level}"
    first = results[0][1]
    parts = [f"<p>Dataset: <code>{esc(first.dataset)}</code>; training split <b>{esc(first.train_split)}</b>, "
             f"reference <b>{esc(first.reference_split)}</b>; {first.confidence:.0%} Wilson score intervals; "
             f"gap intervals from {first.n_boot} bootstrap resamples (seed {first.seed}).</p>"]
    for label, r in results:
        parts.append(f"<{h}>Verdict: {esc(label)}</{h}><p>predictions <code>{esc(r.predictions)}</code>, "
                     f"{r.n_scored}/{r.n_images} images scored</p><ul>")
        parts += [f"<li class='verdict'>{esc(v)}</li>" for v in r.verdicts]
        parts += [f"<li><i>note: {esc(n)}</i></li>" for n in r.notes]
        parts.append("</ul>")
    if len(results) > 1:
        parts.append(f"<{h}>Side by side</{h}>")
        parts.append(compare(results[0][1], results[1][1], (results[0][0], results[1][0])).to_html(
            index=False, float_format=lambda v: f"{v:.3f}"))
    parts.append(f"<{h}>Accuracy per split</{h}>" + _img(_plot_splits(results)))
    if any(len(r.distance) for _, r in results):
        parts.append(f"<{h}>Accuracy against distance from the training region</{h}>"
                     "<p>Each held-out image's distance to the nearest training image on that axis "
                     "(position: centre to centre; scale: octaves; angle and hue: degrees the short way round), "
                     "in equal-count bins; the marker at 0 is the reference split; dashed: chance. Axes along "
                     "which no split lies beyond the training images are in the distance table only.</p>"
                     + _img(_plot_distance(results)))
    if any(len(r.by_value) for _, r in results):
        parts.append(f"<{h}>Accuracy against each axis value</{h}><p>Shaded: where the training images lie.</p>"
                     + _img(_plot_values(results)))
    for label, r in results:
        parts.append(f"<{h}>Tables: {esc(label)}</{h}>")
        for name in ("by_split", "gaps", "by_class", "by_cell", "distance"):
            t = r.tables()[name]
            parts.append(f"<details{' open' if name in ('by_split', 'gaps') else ''}><summary>{name}</summary>"
                         + t.to_html(index=False, float_format=lambda v: f"{v:.4g}") + "</details>")
    return parts


def _img(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    return f"<img alt='plot' src='data:image/png;base64,{base64.b64encode(buf.getvalue()).decode('ascii')}'>"


def _plt():
    from augsplit import figures  # Figure objects on an Agg canvas: no pyplot, the backend left alone

    return figures


COLOURS = ("tab:blue", "tab:orange", "tab:green", "tab:red", "tab:purple", "tab:brown")
STYLES = ("-", "--", ":", "-.")


def _plot_splits(results):
    plt = _plt()
    splits = list(results[0][1].by_split["split"])
    fig, ax = plt.subplots(figsize=(max(4, 1.4 * len(splits) * len(results)), 3))
    w = 0.8 / len(results)
    for j, (label, r) in enumerate(results):
        t = r.by_split.set_index("split").reindex(splits)
        x = np.arange(len(splits)) + (j - (len(results) - 1) / 2) * w
        ax.bar(x, t["accuracy"], w, color=COLOURS[j % len(COLOURS)], label=label,
               yerr=[t["accuracy"] - t["ci_lo"], t["ci_hi"] - t["accuracy"]], capsize=3)
        ax.scatter(x, t["chance"], marker="_", color="k", s=200, zorder=3)
    ax.set_xticks(np.arange(len(splits)), splits)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("accuracy")
    ax.legend(fontsize=8)
    return fig


def _plot_distance(results):
    plt = _plt()
    axes_names = list(dict.fromkeys(a for _, r in results for a in r.distance.loc[r.distance["held_out_along"], "axis"]))
    axes_names = axes_names or list(dict.fromkeys(a for _, r in results for a in r.distance["axis"]))
    fig, axs = plt.subplots(1, len(axes_names), figsize=(4 * len(axes_names), 3.2), squeeze=False)
    for ax, name in zip(axs[0], axes_names):
        for j, (label, r) in enumerate(results):
            col = COLOURS[j % len(COLOURS)]
            splits = r.by_split.set_index("split")
            if r.reference_split in splits.index:
                ref = splits.loc[r.reference_split]
                ax.errorbar([0], [ref["accuracy"]], yerr=[[ref["accuracy"] - ref["ci_lo"]], [ref["ci_hi"] - ref["accuracy"]]],
                            fmt="o", color=col, capsize=3)
            t = r.distance[r.distance["axis"] == name]
            for i, (split, g) in enumerate(t.groupby("split", sort=True)):
                ax.errorbar(g["mean_distance"], g["accuracy"], yerr=[g["accuracy"] - g["ci_lo"], g["ci_hi"] - g["accuracy"]],
                            color=col, ls=STYLES[i % len(STYLES)], marker=".", capsize=2, label=f"{label}: {split}")
                ax.axhline(splits.loc[split, "chance"], color="grey", ls="--", lw=0.8)
        unit = results[0][1].distance.loc[results[0][1].distance["axis"] == name, "unit"]
        ax.set_xlabel(f"{name} ({unit.iloc[0] if len(unit) else ''})")
        ax.set_ylim(0, 1.05)
        ax.set_ylabel("accuracy")
    _fig_legend(fig, axs.ravel())
    return fig


def _plot_values(results):
    from matplotlib.ticker import NullLocator

    plt = _plt()
    axes_names = list(dict.fromkeys(a for _, r in results for a in r.by_value["axis"]))
    ncol = min(3, len(axes_names))
    nrow = math.ceil(len(axes_names) / ncol)
    fig, axs = plt.subplots(nrow, ncol, figsize=(4.2 * ncol, 3 * nrow), squeeze=False)
    for ax, name in zip(axs.ravel(), axes_names):
        rng_info = results[0][1].train_ranges.get(name, {})
        for a, b in rng_info.get("intervals", []):
            ax.axvspan(a, b, color="0.85")
        for j, (label, r) in enumerate(results):
            t = r.by_value[r.by_value["axis"] == name]
            for i, (split, g) in enumerate(t.groupby("split", sort=True)):
                x = g["centre"]
                o = np.argsort(x.to_numpy())
                ax.errorbar(x.to_numpy()[o], g["accuracy"].to_numpy()[o],
                            yerr=[(g["accuracy"] - g["ci_lo"]).to_numpy()[o], (g["ci_hi"] - g["accuracy"]).to_numpy()[o]],
                            color=COLOURS[j % len(COLOURS)], ls=STYLES[i % len(STYLES)], marker=".", capsize=2,
                            label=f"{label}: {split}")
        if rng_info.get("kind") == "log":
            ax.set_xscale("log", base=2)
            lo, hi = ax.get_xlim()
            ticks = np.exp2(np.linspace(np.log2(lo), np.log2(hi), 5)[1:-1])
            ax.set_xticks(ticks, [f"{t:.3g}" for t in ticks])
            ax.xaxis.set_minor_locator(NullLocator())
        ax.set_xlabel(f"{name} ({rng_info.get('unit', '')})")
        ax.set_ylim(0, 1.05)
    for ax in axs.ravel()[len(axes_names):]:
        ax.axis("off")
    _fig_legend(fig, axs.ravel())
    return fig


def _fig_legend(fig, axes) -> None:
    """One legend under all panels, so no curve is hidden behind it."""
    seen = {}
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            seen.setdefault(lab, h)
    fig.tight_layout(rect=(0, 0.1 if seen else 0, 1, 1))
    if seen:
        fig.legend(list(seen.values()), list(seen), loc="lower center", ncol=min(4, len(seen)), fontsize=8,
                   frameon=False)


# ---------------------------------------------------------------- small helpers


def _records(t: pd.DataFrame) -> list[dict]:
    return plain(t.to_dict(orient="records"))


def _few(items, n: int = 5) -> str:
    items = [str(i) for i in items]
    more = f", ... {len(items) - n} more" if len(items) > n else ""
    return ", ".join(items[:n]) + more


def _row(mask) -> int:
    return int(np.flatnonzero(np.asarray(mask))[0]) + 1


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
