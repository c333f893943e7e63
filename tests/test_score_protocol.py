"""`augsplit score` states what it measures against, through the command line on generated data:
per-class protocols measure distance to the same class, a missing i.i.d. split is cautioned,
circular values stay in their axis range, and every bad option value is one line, exit 2,
naming the option. Each test here uses only the CLI and the generator, so it runs on any
version of the package."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy.spatial.distance import cdist

from augsplit.build import open_mapping
from augsplit.dataset import read_manifest
from augsplit.generate import Options, generate

CONFIGS = Path(__file__).resolve().parent.parent / "configs"


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "augsplit.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=300, cwd=cwd)


@pytest.fixture(scope="module")
def per_class(tmp_path_factory):
    """configs/per_class_placement.yaml generated, with perfect predictions."""
    root = tmp_path_factory.mktemp("pc")
    built = open_mapping(yaml.safe_load((CONFIGS / "per_class_placement.yaml").read_text()))
    generate(None, root / "data", Options(progress=False, store="none"), built=built)
    m = read_manifest(root / "data")
    pred = root / "perfect.csv"
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]}).to_csv(pred, index=False)
    gap = min(v.numbers["gap_px"] for v in built.plan.verdicts if v.kind == "footprint")
    return root / "data", pred, m, gap


@pytest.fixture(scope="module")
def scored(per_class, tmp_path_factory):
    data, pred, _, _ = per_class
    out = tmp_path_factory.mktemp("rep") / "score"
    r = run("score", data, pred, "--out", out)
    assert r.returncode == 0, r.stderr
    return r.stdout, json.loads((out / "score.json").read_text()), pd.read_csv(out / "per_image.csv")


def test_per_class_protocol_measures_distance_to_the_same_class(per_class, scored):
    """Every test image lies at least the plan's proved gap from every training image of its
    class (the property the footprint proof gives, centre to centre), and the report says the
    reference is the same class."""
    _, _, m, gap = per_class
    text, doc, rows = scored
    assert doc["distance_reference"] == "same class"
    test = rows[rows["split"] == "test"]
    assert len(test) == (m["split"] == "test").sum()
    assert (test["dist_position_px"] >= gap - 1e-6).all(), (test["dist_position_px"].min(), gap)
    # brute force (scipy cdist), the nearest same-class training centre of each test image
    train = m[m["split"] == "train"]
    for c, g in test.groupby("class_index"):
        tr = train.loc[train["class_index"] == c, ["cx_px", "cy_px"]].to_numpy(float)
        want = cdist(g[["cx_px", "cy_px"]].to_numpy(float), tr).min(axis=1)
        assert np.allclose(g["dist_position_px"].to_numpy(), want)
    assert "same class" in text


def test_per_class_protocol_text_no_longer_says_no_split_lies_beyond_on_position(scored):
    text, doc, _ = scored
    beyond = {r["axis"] for r in doc["distance"] if r["held_out_along"]}
    assert "position_px" in beyond
    hidden = [ln for ln in text.splitlines() if "no split lies beyond" in ln]
    assert not any("position_px" in ln for ln in hidden), hidden


def test_without_an_iid_split_the_reference_is_cautioned(scored):
    """The per-class config has no i.i.d. test split: gaps are against the training images."""
    text, doc, _ = scored
    assert doc["reference_split"] == "train"
    cautions = [n for n in doc["notes"] if n.startswith("caution")]
    assert len(cautions) == 1 and "training split" in cautions[0] and "optimistic" in cautions[0]
    assert "caution" in text


def test_circular_values_stay_in_their_axis_range(scored):
    """angle and polar_angle are [0, 360] axes: every bin edge, centre and training interval
    the report gives lies in [0, 360)."""
    _, doc, rows = scored
    circ = [r for r in doc["by_value"] if r["axis"] in ("angle", "polar_angle")]
    assert {r["axis"] for r in circ} == {"angle", "polar_angle"}
    for r in circ:
        for key in ("lo", "hi", "centre"):
            assert 0.0 <= r[key] < 360.0, r
    for axis in ("angle", "polar_angle"):
        for a, b in doc["train_ranges"][axis]["intervals"]:
            assert 0.0 <= a < 360.0 and 0.0 <= b < 360.0
    assert rows["angle"].between(0, 360).all()


# ---- option values -----------------------------------------------------------------------------


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    root = tmp_path_factory.mktemp("small")
    built = open_mapping({"seed": 3, "canvas": {"width": 48, "height": 48, "mode": "gray"},
                          "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
                          "axes": {"x": {"range": [4, 44]}},
                          "splits": {"train": {"region": {"x": [4, 16]}, "per_class": 3},
                                     "test": {"region": {"x": [32, 44]}, "per_class": 3}}})
    generate(None, root / "data", Options(progress=False, store="none"), built=built)
    m = read_manifest(root / "data")
    good = root / "good.csv"
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]}).to_csv(good, index=False)
    wrong = root / "wrong.csv"
    pd.DataFrame({"image_id": m["image_id"], "guess": m["class_name"]}).to_csv(wrong, index=False)
    return root, good, wrong


@pytest.mark.parametrize("case, option", [
    ("train", "--train-split"), ("reference", "--reference-split"), ("wrong", "PREDICTIONS"),
    ("compare", "--compare"), ("out", "--out"),
])
def test_every_bad_option_value_is_one_line_exit_2_naming_the_option(small, case, option):
    root, good, wrong = small
    data, out = root / "data", root / f"rep_{case}"
    args = {"train": [good, "--train-split", "nosuch"], "reference": [good, "--reference-split", "nosuch"],
            "wrong": [wrong], "compare": [good, "--compare", wrong],
            "out": [good]}[case]
    out_arg = root / "no_such_parent" / "rep" if case == "out" else out
    r = run("score", data, *args, "--out", out_arg)
    assert r.returncode == 2, (r.returncode, r.stderr)
    assert r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
    assert option in r.stderr, r.stderr
    assert not (out / "score.json").exists()
