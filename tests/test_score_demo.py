"""The conveyor demo end to end (at a third of its image counts), and `run_score` reproducing
its numbers from the files it leaves behind."""

from __future__ import annotations

import importlib.util
import json
import sys
from pathlib import Path

import numpy as np
import pytest

from augsplit import score as S

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    spec = importlib.util.spec_from_file_location("run_demo", ROOT / "demo" / "run_demo.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod  # dataclasses look their module up while the file runs
    spec.loader.exec_module(mod)
    out = tmp_path_factory.mktemp("demo")
    runs = mod.run_demo(ROOT / "configs" / "demo_conveyor.yaml", out, noise=True, scale_counts=0.34, say=lambda *_: None)
    return out, {r.name: r for r in runs}


def _acc(run, label, split):
    r = dict(run.results)[label]
    return r.by_split.set_index("split").loc[split]


def test_black_belt_pixels_model_is_bias_only_and_pooled_model_transfers(demo):
    _, runs = demo
    run = runs["main"]
    assert run.audit_verdict == "pass"
    f = run.facts["test_far_lane"]
    # From the gradient of the loss (see tests/test_models.py): weights on pixels only the far
    # lane lights stay exactly zero, so far-lane logits are the bias and the guess is constant.
    assert f["pixels_lit_by_both"] == 0 and f["pixels_lit_by_test_only"] > 100
    assert f["max_abs_weight_on_test_only_pixels"] == 0.0
    assert f["logits_equal_bias_for_every_test_image"] and f["distinct_predictions"] == 1
    px = _acc(run, "pixels", "test_far_lane")
    lo, hi = S.chance_bounds(int(px["n"]), 1 / 5)  # scipy.stats.binom.interval, five balanced classes
    assert lo <= px["accuracy"] <= hi
    pooled = _acc(run, "pooled", "test_far_lane")
    assert pooled["ci_lo"] > hi  # Wilson (1927) lower bound above chance


def test_noise_belt_shows_the_same_gap_empirically(demo):
    _, runs = demo
    run = runs["noise"]
    assert run.facts["test_far_lane"]["pixels_lit_by_both"] > 0  # nothing forces zero weights here
    px, pooled = _acc(run, "pixels", "test_far_lane"), _acc(run, "pooled", "test_far_lane")
    assert pooled["ci_lo"] > px["ci_hi"]  # Wilson (1927) intervals do not overlap


def test_page_shows_both_models_curves_against_distance(demo):
    out, _ = demo
    page = (out / "report.html").read_text()
    assert page.count("Accuracy against distance from the training region") == 2
    assert page.count("data:image/png;base64,") >= 6
    assert "pixels" in page and "pooled" in page and "Verdict" in page


def test_run_score_reproduces_the_demo_from_its_files(demo, tmp_path):
    out, runs = demo
    r = S.run_score(out / "dataset", out / "predictions" / "pixels.csv", tmp_path,
                    compare=out / "predictions" / "pooled.csv", echo=False)
    assert r.reference_split == "test_same_lane"  # taken from dataset.json: the i.i.d. test split
    mine = json.loads((tmp_path / "score.json").read_text())["models"]
    theirs = json.loads((out / "score" / "score.json").read_text())["models"]
    for label in ("pixels", "pooled"):
        for table in ("by_split", "by_class", "by_cell", "distance", "by_value", "gaps"):
            assert mine[label][table] == theirs[label][table], (label, table)
        assert mine[label]["verdicts"] == theirs[label]["verdicts"]
    demo_r = dict(runs["main"].results)["pixels"]
    assert np.allclose(r.by_split["accuracy"], demo_r.by_split["accuracy"])
