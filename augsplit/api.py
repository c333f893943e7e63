"""The public functions that are more than a re-export: each calls one library function with
the arguments a Python user has at hand (a path or an opened spec; a path or a table), so the
names in `augsplit.__all__` do not collide with the modules of the same job (augsplit.generate,
augsplit.score, augsplit.audit). Imports are made inside the functions: `import augsplit`
stays fast."""

from __future__ import annotations

from pathlib import Path


def generate_dataset(spec, out, **options) -> dict:
    """Make (or with ``resume=True`` finish) the dataset of `spec` in the folder `out`.

    `spec` is a spec file, the name of a built-in spec ("demo") or what `open_spec` returned.
    Options are those of ``augsplit generate``: store ("files", "parquet", "none"), format,
    quality, shard_size, workers, resume, overwrite, progress, executor, scheduler. Returns
    the dataset's summary (what dataset.json holds)."""
    from .build import Built
    from .generate import Options, generate
    from .spec import builtin_spec_path

    if isinstance(spec, Built):
        return generate(None, out, Options(**options), built=spec)
    return generate(_spec_path(spec, builtin_spec_path), out, Options(**options))


def _spec_path(spec, builtin_spec_path) -> Path:
    return builtin_spec_path("demo") if str(spec) == "demo" else Path(spec)  # as the command line


def open_spec(spec, *, for_data: bool = False):
    """Load, validate and plan a spec file (or the built-in "demo"). The result's ``.plan``
    holds the splits (``plan.split(name).region``), the transform space (``plan.space``),
    the classes and the proofs of the guarantees; ``.source`` and ``.background`` draw the
    images. Raises SpecError naming the key path of a bad spec."""
    from .build import open_spec as _open
    from .spec import builtin_spec_path

    return _open(_spec_path(spec, builtin_spec_path), for_data=for_data)


def score_predictions(dataset, predictions, *, train_split: str | None = None, reference_split: str | None = None,
                      allow_partial: bool = False, probabilities: bool | None = None):
    """Score a model's predictions on a dataset folder: accuracy per split and as a function
    of distance from the training region (see ``augsplit score``). `predictions` is a CSV or
    Parquet file with ``image_id`` and ``predicted`` (or ``prob_<class>``) columns, or such
    a pandas DataFrame. Returns a ScoreResult (its tables are DataFrames); writes nothing."""
    from .dataset import open_dataset
    from .score import dataset_roles, load_predictions, manifest_of, score
    from .score.predictions import check_predictions

    folder = open_dataset(dataset)
    role_train, role_ref = dataset_roles(folder)
    if hasattr(predictions, "columns"):  # the checks a file's predictions pass, on a copy
        predictions = check_predictions(predictions.copy(), "predictions DataFrame", probabilities=probabilities)
    else:
        predictions = load_predictions(predictions, probabilities=probabilities)
    return score(manifest_of(folder), predictions, train_split or role_train or "train",
                 reference_split=reference_split or role_ref, allow_partial=allow_partial)


def builtin_spec_path(name: str = "demo") -> Path:
    """The path of a spec shipped with augsplit ("demo": the conveyor belt of the README)."""
    from .spec import builtin_spec_path as _path

    return _path(name)
