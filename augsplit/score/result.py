"""ScoreResult: everything one scoring run measured, as tables, and its JSON form."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from augsplit.io import plain

from .distance import ANY_CLASS
from .statistics import CONFIDENCE, N_BOOT, SEED


def records(t: pd.DataFrame) -> list[dict]:
    return plain(t.to_dict(orient="records"))


@dataclass(frozen=True)
class ScoreResult:
    """Everything `score` measured. Tables are pandas DataFrames; `rows` has one row per image.

    `distance_reference` says what distances are measured to: the nearest training image of
    "any class", or of the "same class" (where the protocol is per class)."""

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
    distance_reference: str = ANY_CLASS

    def __repr__(self) -> str:
        from ..reprs import score_repr

        return score_repr(self)

    def _repr_html_(self) -> str:
        from ..reprs import score_html

        return score_html(self)

    @property
    def heldout_splits(self) -> tuple[str, ...]:
        return tuple(s for s in self.by_split["split"] if s != self.train_split)

    # the file stem each curve/table is written under, in order (the attribute of per_image: rows)
    TABLES = ("by_split", "by_class", "by_cell", "distance", "by_value", "gaps", "per_image")

    def tables(self) -> dict[str, pd.DataFrame]:
        """Every curve/table by the file stem it is written under."""
        return {name: getattr(self, "rows" if name == "per_image" else name) for name in self.TABLES}

    def to_json(self) -> dict:
        return {
            "dataset": self.dataset, "predictions": self.predictions, "train_split": self.train_split,
            "reference_split": self.reference_split, "distance_reference": self.distance_reference,
            "classes": list(self.classes), "topk": list(self.topk),
            "n_images": self.n_images, "n_scored": self.n_scored, "coverage": self.coverage,
            "confidence": self.confidence, "interval": "Wilson score", "bootstrap": {"n": self.n_boot, "seed": self.seed},
            "verdicts": list(self.verdicts), "notes": list(self.notes),
            "train_ranges": self.train_ranges,
            **{name: records(t) for name, t in self.tables().items() if name != "per_image"},
        }
