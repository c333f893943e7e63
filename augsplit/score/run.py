"""`run_score`: what `augsplit score` does — open the dataset, read each predictions file,
score it, write every report and print the terminal table."""

from __future__ import annotations

from pathlib import Path

from augsplit.errors import AugsplitError, DatasetError

from .inputs import dataset_roles, manifest_of
from .predictions import load_predictions
from .report import compare_table_text, format_table, write_outputs
from .result import ScoreResult
from .scoring import score


def run_score(dataset_dir, predictions_path, out_dir, compare=None, *, train_split: str | None = None,
              reference_split: str | None = None, allow_partial: bool = False, probabilities: bool | None = None,
              labels: tuple[str, str] | None = None, echo: bool = True) -> ScoreResult:
    """Score one predictions file (and optionally a second, side by side); write every report.

    The training split defaults to the one the dataset's summary names (else "train"); the
    reference split to its i.i.d. test split from the training region, if it has exactly one
    (else the training split, with a caution). Returns the first file's result. `augsplit score`
    calls this; an error names the option or argument whose value is at fault.
    """
    from augsplit.dataset import open_dataset

    folder = open_dataset(dataset_dir)
    manifest = manifest_of(folder)
    role_train, role_ref = dataset_roles(folder)
    _check_split_option("--train-split", train_split, folder.splits)
    _check_split_option("--reference-split", reference_split, folder.splits)
    train_split = train_split or role_train or "train"
    reference_split = reference_split or role_ref
    paths = prediction_paths(predictions_path, compare)
    labels = labels or labels_of(paths)
    results = []
    for label, p, option in zip(labels, paths, ("PREDICTIONS", "--compare")):
        try:
            preds = load_predictions(p, probabilities=probabilities)
            r = score(manifest, preds, train_split, reference_split=reference_split, allow_partial=allow_partial)
        except AugsplitError as err:
            raise DatasetError(err.message, where=f"{option} {err.where or p}", hint=err.hint) from None
        results.append((label, r))
    write_outputs(results, out_dir, inputs=(dataset_dir, *paths))
    if echo:
        print("\n\n".join(format_table(r, label if len(results) > 1 else None) for label, r in results))
        if len(results) > 1:
            print(compare_table_text(results))
    return results[0][1]


def _check_split_option(option: str, name: str | None, splits) -> None:
    if name is not None and name not in splits:
        raise DatasetError(f"{name!r} is not a split of the dataset (splits: {', '.join(splits)})", where=option)


def prediction_paths(predictions_path, compare=None) -> list[Path]:
    return [Path(predictions_path)] + ([Path(compare)] if compare else [])


def labels_of(paths) -> tuple[str, ...]:
    """Each predictions file's label (its name's stem, made safe for file names; "a" and "b"
    when two would be the same): what its tables are prefixed by when there are two."""
    labels = tuple(_label(p, i) for i, p in enumerate(paths))
    return labels if len(set(labels)) == len(labels) else ("a", "b")


def _label(p: Path, i: int) -> str:
    stem = p.stem
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in stem) or f"model{i + 1}"
