"""A model's predictions file: reading it (through augsplit.formats.table), checking it, and
resolving its class labels and per-class scores against the dataset's classes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from augsplit.errors import DatasetError
from augsplit.formats.table import read_table

PREDICTED = "predicted"  # class name or index, resolved against the manifest
PREDICTED_CLASS = "predicted_class"  # class name, never read as an index
PREDICTED_INDEX = "predicted_index"  # class index
CLASS_COLUMNS = (PREDICTED, PREDICTED_CLASS, PREDICTED_INDEX)
SCORE_PREFIX = "score_"  # per-class scores of any kind (logits, margins, probabilities)
PROB_PREFIX = "prob_"  # per-class probabilities: each row must sum to one
PROB_TOLERANCE = 1e-3  # float32 softmax written with 6 digits; common practice, no source


def few(items, n: int = 5) -> str:
    items = [str(i) for i in items]
    more = f", ... {len(items) - n} more" if len(items) > n else ""
    return ", ".join(items[:n]) + more


def first_row(mask) -> int:
    return int(np.flatnonzero(np.asarray(mask))[0]) + 1


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
    # class labels stay text so digit-named classes are not read as indices
    df = read_table(p, text=("image_id", *CLASS_COLUMNS[:2]), what="predictions file")
    return check_predictions(df, str(p), probabilities=probabilities)


def check_predictions(df: pd.DataFrame, where: str, *, probabilities: bool | None = None) -> pd.DataFrame:
    """A predictions table (as `load_predictions` reads one) checked and put in shape, in
    place: ids, one class column or per-class scores, finite scores, probabilities that sum
    to one. A file's and a DataFrame's predictions pass the same checks."""
    df.columns = [str(c).strip() for c in df.columns]
    _check_ids(df, where)
    score_cols, class_col = _column_kinds(df, where)
    if class_col:
        df[class_col] = _class_values(df[class_col], class_col, where)
    if score_cols:
        df[score_cols] = _finite_scores(df[score_cols], where)
    claimed = bool(score_cols) and (score_cols[0].startswith(PROB_PREFIX) or bool(probabilities))
    if claimed:
        _check_probabilities(df[score_cols].to_numpy(dtype=float), where)
    df.attrs.update(where=where, score_columns=tuple(score_cols), probabilities=claimed or bool(probabilities),
                    class_column=class_col)
    return df


def _check_ids(df: pd.DataFrame, where: str) -> None:
    if "image_id" not in df.columns:
        raise DatasetError(f"no 'image_id' column (columns: {', '.join(df.columns[:8])})", where=where)
    ids = df["image_id"]
    bad = ids.isna() | (ids.astype(str).str.strip() == "")
    if bad.any():
        raise DatasetError(f"{int(bad.sum())} row(s) have no image_id (first at row {first_row(bad)})", where=where)
    df["image_id"] = ids.astype(str).str.strip()
    dup = df["image_id"].duplicated(keep=False)
    if dup.any():
        names = list(dict.fromkeys(df.loc[dup, "image_id"]))
        raise DatasetError(f"{len(names)} image id(s) appear more than once (e.g. {few(names)})", where=where)


def _column_kinds(df: pd.DataFrame, where: str) -> tuple[list[str], str | None]:
    """The per-class score columns (one kind) and the one predicted-class column, if any."""
    score_cols = [c for c in df.columns if c.startswith(SCORE_PREFIX)]
    prob_cols = [c for c in df.columns if c.startswith(PROB_PREFIX)]
    if score_cols and prob_cols:
        raise DatasetError("has both score_<class> and prob_<class> columns; keep one kind", where=where)
    class_cols = [c for c in CLASS_COLUMNS if c in df.columns]
    if len(class_cols) > 1:
        raise DatasetError(f"has several predicted-class columns ({', '.join(class_cols)}); keep one", where=where)
    if not class_cols and not (score_cols or prob_cols):
        raise DatasetError("needs a 'predicted' column or per-class score_<class> / prob_<class> columns "
                           f"(columns: {few(df.columns)})", where=where)
    return prob_cols or score_cols, (class_cols[0] if class_cols else None)


def _class_values(values: pd.Series, col: str, where: str) -> pd.Series:
    missing = values.isna() | (values.astype(str).str.strip() == "")
    if missing.any():
        raise DatasetError(f"{int(missing.sum())} row(s) have no {col} (first at row {first_row(missing)})",
                           where=where)
    if col != PREDICTED_INDEX:
        return values.astype(str).str.strip()
    idx = pd.to_numeric(values, errors="coerce")
    bad = idx.isna() | (idx != np.round(idx)) | (idx.abs() > 2.0 ** 53)  # beyond 2**53 a float is no exact index
    if bad.any():
        raise DatasetError(f"{col} must hold whole numbers (first bad at row {first_row(bad)})", where=where)
    return idx.astype(np.int64)


def _finite_scores(frame: pd.DataFrame, where: str) -> pd.DataFrame:
    vals = frame.apply(pd.to_numeric, errors="coerce")
    finite = np.isfinite(vals.to_numpy(dtype=float))
    if not finite.all():
        r, c = np.argwhere(~finite)[0]
        raise DatasetError(f"score column {frame.columns[c]} is not a finite number at row {r + 1}", where=where)
    return vals.astype(float)


def _check_probabilities(m: np.ndarray, where: str) -> None:
    sums = m.sum(axis=1)
    off = np.abs(sums - 1.0) > PROB_TOLERANCE
    outside = (m < -1e-9).any(axis=1) | (m > 1 + 1e-9).any(axis=1)
    if outside.any():
        raise DatasetError(f"{int(outside.sum())} row(s) of probabilities hold values outside [0, 1] "
                           f"(first at row {first_row(outside)})", where=where)
    if off.any():
        i = int(np.flatnonzero(off)[0])
        raise DatasetError(f"{int(off.sum())} row(s) of probabilities do not sum to one "
                           f"(row {i + 1} sums to {sums[i]:.6g}; tolerance {PROB_TOLERANCE:g})", where=where)


# ---- resolving classes against the dataset ---------------------------------------------------


class Classes:
    """The dataset's classes: names in class-index order, and their indices."""

    def __init__(self, names, indices):
        self.names = tuple(str(c) for c in names)
        self.indices = np.asarray(indices, dtype=int)
        self.index_of_name = dict(zip(self.names, self.indices.tolist()))
        self.index_set = set(self.indices.tolist())

    def name_of(self, index: int) -> str:
        return self.names[int(np.searchsorted(self.indices, index))]


def resolve_classes(pred: pd.DataFrame, classes: Classes, where: str):
    """Predicted class index per row, and the score matrix in class-index order (or None)."""
    score_mat = _score_matrix(pred, classes, where)
    col = pred.attrs.get("class_column") or next((c for c in CLASS_COLUMNS if c in pred.columns), None)
    if col is None:
        return classes.indices[score_mat.argmax(1)], score_mat
    if col == PREDICTED_INDEX:
        idx = pred[col].to_numpy(dtype=np.int64)
        bad = ~np.isin(idx, classes.indices)
        if bad.any():
            raise DatasetError(f"{int(bad.sum())} prediction(s) name class indices the dataset does not have "
                               f"({few(sorted(set(idx[bad].tolist())))}; classes are {few(sorted(classes.index_set))})",
                               where=where)
        return idx, score_mat
    by_index = col == PREDICTED  # `predicted` may hold indices; `predicted_class` only names
    labels = pred[col].astype(str).tolist()
    return np.asarray(labels_to_indices(labels, classes, where, "predicted class(es)", by_index)), score_mat


def _score_matrix(pred: pd.DataFrame, classes: Classes, where: str):
    cols = list(pred.attrs.get("score_columns") or [c for c in pred.columns if c.startswith((SCORE_PREFIX, PROB_PREFIX))])
    if not cols:
        return None
    prefix = PROB_PREFIX if cols[0].startswith(PROB_PREFIX) else SCORE_PREFIX
    if not all(c.startswith(prefix) for c in cols):
        raise DatasetError("has both score_<class> and prob_<class> columns; keep one kind", where=where)
    col_idx = labels_to_indices([c[len(prefix):] for c in cols], classes, where, f"{prefix}<class> column(s)")
    lacking = sorted(classes.index_set - set(col_idx))
    if lacking:
        raise DatasetError(f"scores given for {len(set(col_idx))} of {len(classes.names)} classes; "
                           f"no {prefix}<class> column for {few(classes.name_of(i) for i in lacking)}", where=where)
    if len(set(col_idx)) != len(col_idx):
        raise DatasetError(f"two {prefix}<class> columns name the same class", where=where)
    return pred[cols].to_numpy(dtype=float)[:, np.argsort(col_idx)]


def _whole_numbers(labels) -> dict:
    as_int = {}
    for u in labels:
        try:
            f = float(u)
            if f == int(f):
                as_int[u] = int(f)
        except (ValueError, OverflowError):
            pass
    return as_int


def labels_to_indices(labels, classes: Classes, where, what, by_index: bool = True) -> list[int]:
    """Labels are class names when all are names; else (if `by_index`) indices when all are
    whole numbers."""
    uniq = list(dict.fromkeys(labels))
    as_int = _whole_numbers(uniq) if by_index else {}
    if all(u in classes.index_of_name for u in uniq):
        ambiguous = [u for u in uniq if u in as_int and as_int[u] in classes.index_set
                     and classes.index_of_name[u] != as_int[u]]
        if ambiguous:
            raise DatasetError(f"{what} {few(ambiguous)} are both class names and other classes' indices",
                               where=where, hint="name the column predicted_class or predicted_index")
        return [classes.index_of_name[u] for u in labels]
    if by_index and all(u in as_int for u in uniq):
        bad = sorted({as_int[u] for u in uniq if as_int[u] not in classes.index_set})
        if bad:
            raise DatasetError(f"{what} use class indices the dataset does not have ({few(bad)}; "
                               f"it has {few(sorted(classes.index_set))})", where=where)
        return [as_int[u] for u in labels]
    bad = [u for u in uniq if u not in classes.index_of_name]
    raise DatasetError(f"{what} name {len(bad)} class(es) the dataset does not have ({few(bad)}; "
                       f"it has {few(sorted(classes.index_of_name))})", where=where)
