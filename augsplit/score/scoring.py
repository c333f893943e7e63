"""`score`: join a model's predictions to a manifest and measure accuracy per split, class and
cell, against distance from the training images and against each axis value, with intervals.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from augsplit.errors import DatasetError

from .distance import ANY_CLASS, SAME_CLASS, add_distance_columns
from .predictions import Classes, few, resolve_classes
from .result import ScoreResult
from .statistics import CONFIDENCE, N_BOOT, SEED, expected_calibration_error
from .tables import accuracy_table, add_chance, add_coverage, distance_table, gap_table, value_table, verdict


def score(manifest: pd.DataFrame, predictions: pd.DataFrame, train_split: str = "train", *,
          reference_split: str | None = None, allow_partial: bool = False, topk: tuple[int, ...] = (2, 5),
          n_bins: int = 8, n_value_bins: int = 16, n_boot: int = N_BOOT, seed: int = SEED,
          confidence: float = CONFIDENCE, same_class: bool | None = None) -> ScoreResult:
    """Join predictions to the manifest and measure accuracy against distance from training.

    `train_split` defines the training region (distances are measured from its rows);
    `reference_split` (default: the training split, with a caution in `notes`) is the
    in-region accuracy each held-out split's is compared with. `same_class` measures distance
    to the nearest training image of the image's own class (default: what the manifest's
    dataset says, `manifest.attrs["per_class"]`, set by `manifest_of` for per-class protocols).
    Refuses to score a subset of the manifest unless `allow_partial`.
    """
    where = predictions.attrs.get("where", "predictions")
    mwhere = manifest.attrs.get("where", "manifest")
    splits = _split_order(manifest, train_split, reference_split or train_split, mwhere)
    classes = _classes(manifest, mwhere)
    notes = _check_ids(manifest, predictions, where, allow_partial)
    if same_class is None:
        same_class = bool(manifest.attrs.get("per_class"))
    pred_idx, score_mat = resolve_classes(predictions, classes, where)
    rows = _join(manifest, predictions, pred_idx, classes)
    ks = _topk(rows, predictions, score_mat, classes, topk, notes)
    dist_axes = add_distance_columns(manifest, rows, train_split, same_class)
    notes += _reference_notes(manifest, rows, train_split, reference_split, same_class, dist_axes)
    reference_split = reference_split or train_split
    rows["split"] = pd.Categorical(rows["split"].astype(str), categories=splits, ordered=True)
    by_split = _split_table(manifest, rows, ks, confidence)
    by_class = accuracy_table(rows, ["split", "class_name"], ks, confidence)
    by_cell = accuracy_table(rows if "cell" in rows.columns else rows.assign(cell=-1), ["split", "cell"], ks, confidence)
    distance = distance_table(rows, manifest, dist_axes, train_split, n_bins, confidence, same_class)
    by_value, train_ranges = value_table(manifest, rows, train_split, n_value_bins, confidence,
                                         manifest.attrs.get("axis_lo"))
    gaps = gap_table(rows, splits, train_split, reference_split, n_boot, seed, confidence)
    verdicts = tuple(verdict(r, by_split) for _, r in gaps.iterrows())
    for t in (by_split, by_class, by_cell, distance, by_value, rows):
        t["split"] = t["split"].astype(str)
    return ScoreResult(
        dataset=mwhere, predictions=where, train_split=train_split, reference_split=reference_split,
        classes=classes.names, topk=ks, n_images=len(manifest), n_scored=len(rows),
        coverage=len(predictions) / len(manifest),
        rows=rows, by_split=by_split, by_class=by_class, by_cell=by_cell, distance=distance, by_value=by_value,
        train_ranges=train_ranges, gaps=gaps, verdicts=verdicts, notes=tuple(notes),
        confidence=confidence, n_boot=n_boot, seed=seed, distance_reference=SAME_CLASS if same_class else ANY_CLASS)


def _split_order(manifest: pd.DataFrame, train_split: str, reference_split: str, mwhere: str) -> list[str]:
    """The manifest's splits, training split first, then in the manifest's (spec) order."""
    present = list(pd.unique(manifest["split"].astype(str)))
    splits = sorted(present, key=lambda s: (s != train_split, present.index(s)))
    for name, what, option in ((train_split, "training", "train"), (reference_split, "reference", "reference")):
        if name not in splits:
            raise DatasetError(f"{what} split {name!r} is not in the dataset (splits: {', '.join(splits)})",
                               where=mwhere, hint=f"{option}_split= / --{option}-split names one of them")
    return splits


def _classes(manifest: pd.DataFrame, mwhere: str) -> Classes:
    class_map = manifest[["class_index", "class_name"]].drop_duplicates().sort_values("class_index")
    if class_map["class_index"].duplicated().any() or class_map["class_name"].duplicated().any():
        raise DatasetError("manifest maps class names to indices inconsistently", where=mwhere)
    return Classes(class_map["class_name"], class_map["class_index"])


def _check_ids(manifest: pd.DataFrame, predictions: pd.DataFrame, where: str, allow_partial: bool) -> list[str]:
    """Refuse ids the manifest lacks or repeats; a partial cover is refused or (allowed) noted."""
    mwhere = manifest.attrs.get("where", "manifest")
    if manifest["image_id"].duplicated().any():
        raise DatasetError("manifest has duplicate image ids", where=mwhere)
    if predictions.empty:
        raise DatasetError("predictions file has no rows", where=where)
    pid = predictions["image_id"].astype(str)
    if pid.duplicated().any():
        dups = list(dict.fromkeys(pid[pid.duplicated()]))
        raise DatasetError(f"{len(dups)} image id(s) appear more than once (e.g. {few(dups)})", where=where)
    unknown = ~pid.isin(set(manifest["image_id"].astype(str)))
    if unknown.any():
        raise DatasetError(f"{int(unknown.sum())} prediction id(s) are not in the manifest "
                           f"(e.g. {few(list(pid[unknown]))})", where=where)
    n_images, n_scored = len(manifest), len(predictions)
    if n_scored == n_images:
        return []
    missing = manifest.loc[~manifest["image_id"].astype(str).isin(set(pid)), "image_id"].astype(str)
    msg = (f"predictions cover {n_scored} of {n_images} images ({n_scored / n_images:.1%}); "
           f"{len(missing)} missing (e.g. {few(list(missing))})")
    if not allow_partial:
        raise DatasetError(msg, where=where,
                           hint="pass allow_partial=True / --allow-partial to score the covered images only")
    return [msg]


def _join(manifest: pd.DataFrame, predictions: pd.DataFrame, pred_idx, classes: Classes) -> pd.DataFrame:
    """One row per scored image, in manifest order, with its prediction and whether it is right."""
    pred = pd.DataFrame({"image_id": predictions["image_id"].astype(str).to_numpy(), "predicted_index": pred_idx})
    rows = manifest.merge(pred, on="image_id", how="inner", validate="one_to_one")  # keeps manifest order
    rows["predicted_class"] = [classes.name_of(i) for i in rows["predicted_index"]]
    rows["correct"] = rows["predicted_index"].to_numpy() == rows["class_index"].to_numpy(dtype=int)
    return rows


def _topk(rows, predictions, score_mat, classes: Classes, topk, notes: list[str]) -> tuple[int, ...]:
    """Top-k correctness (and, for probabilities, the confidence) per row from the scores."""
    if score_mat is None:
        return ()
    ks = tuple(sorted({int(k) for k in topk if 1 < int(k) < len(classes.names)}))
    sm = score_mat[pd.Index(predictions["image_id"].astype(str)).get_indexer(rows["image_id"])]
    at = np.arange(len(rows))
    true_score = sm[at, np.searchsorted(classes.indices, rows["class_index"].to_numpy(dtype=int))]
    # ties count against the true class, so a constant scorer gets no credit
    rank = (sm > true_score[:, None]).sum(1) + (sm == true_score[:, None]).sum(1) - 1
    for k in ks:
        rows[f"top{k}_correct"] = rank < k
    disagree = int((classes.indices[sm.argmax(1)] != rows["predicted_index"].to_numpy()).sum())
    if disagree and predictions.attrs.get("class_column"):
        notes.append(f"{disagree} row(s) predict a class other than their highest score; "
                     "accuracy uses the predicted column, top-k the scores")
    if predictions.attrs.get("probabilities"):
        rows["confidence"] = sm[at, np.searchsorted(classes.indices, rows["predicted_index"].to_numpy())]
    return ks


def _split_table(manifest, rows, ks, confidence) -> pd.DataFrame:
    by_split = add_chance(add_coverage(accuracy_table(rows, ["split"], ks, confidence), manifest), rows)
    if "confidence" in rows.columns:
        groups = rows.groupby("split", observed=True)
        cal = {s: expected_calibration_error(g["confidence"].to_numpy(), g["correct"].to_numpy()) for s, g in groups}
        by_split["mean_confidence"] = by_split["split"].map(groups["confidence"].mean()).astype(float)
        by_split["ece"] = by_split["split"].map(cal).astype(float)
    return by_split


def _reference_notes(manifest, rows, train_split, reference_split, same_class, dist_axes) -> list[str]:
    """What the gaps and distances are measured against, where a reader could assume otherwise."""
    notes = []
    if (reference_split or train_split) == train_split:
        notes.append(f"caution: no i.i.d. test split from the training region is the reference, so gaps are "
                     f"measured against the training split '{train_split}' itself, the images the model was "
                     "fitted to (optimistic; a held-out split looks worse than it is)")
    if same_class:
        why = manifest.attrs.get("per_class_reason") or "asked for"
        notes.append(f"distances are to the nearest training image of the same class ({why})")
        unknown = sum(int(np.isnan(rows[f"dist_{ax.name}"].to_numpy(dtype=float)).sum()) for ax in dist_axes[:1])
        if unknown:
            notes.append(f"{unknown} image(s) of classes with no training image have no same-class distance "
                         "and are left out of the distance table")
    return notes
