"""Scoring: join a model's predictions to a dataset's manifest and measure how accuracy falls
with distance from the training region, per split / class / cell / axis value, with intervals.

Modules by concern: `predictions` (the predictions file), `statistics` (intervals and tests),
`distance` (distance from the training images, per axis), `tables` (accuracy tables),
`scoring` (`score`), `report` and `plots` (terminal, JSON, CSV, HTML), `inputs` (what is read
from a dataset folder), `run` (`run_score`, what `augsplit score` calls).
"""

from augsplit.errors import DatasetError

from .distance import DISTANCE_AXES, VALUE_AXES, nearest_distance, train_spacing, wrap
from .inputs import dataset_roles, manifest_of, read_manifest
from .predictions import load_predictions
from .report import compare, format_table, html_page, render_html, render_sections, write_outputs
from .result import ScoreResult
from .run import run_score
from .scoring import score
from .statistics import bootstrap_gap, bootstrap_mean_ci, chance_bounds, expected_calibration_error, wilson_interval

__all__ = [
    "DISTANCE_AXES", "VALUE_AXES", "DatasetError", "ScoreResult", "bootstrap_gap", "bootstrap_mean_ci",
    "chance_bounds", "compare", "dataset_roles", "expected_calibration_error", "format_table", "html_page",
    "load_predictions", "manifest_of", "nearest_distance", "read_manifest", "render_html", "render_sections",
    "run_score", "score", "train_spacing", "wilson_interval", "wrap", "write_outputs",
]
