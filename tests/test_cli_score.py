"""`augsplit score` through the command line: reports written, bad predictions exit 2."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from specs import lanes_dataset

from augsplit.dataset import read_manifest


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    return lanes_dataset(tmp_path_factory.mktemp("ds") / "data", per_class=10, store="none")


def run(*args):
    return subprocess.run([sys.executable, "-m", "augsplit.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=120)


def test_score_writes_reports_matching_the_predictions(dataset, tmp_path):
    m = read_manifest(dataset)
    rng = np.random.default_rng(0)
    right = rng.random(len(m)) < np.where(m["split"] == "train", 0.9, 0.5)
    other = {c: next(o for o in m["class_name"].unique() if o != c) for c in m["class_name"].unique()}
    pred = np.where(right, m["class_name"], m["class_name"].map(other))
    p = tmp_path / "pred.csv"
    pd.DataFrame({"image_id": m["image_id"], "predicted": pred}).to_csv(p, index=False)
    r = run("score", dataset, p, "--out", tmp_path / "rep")
    assert r.returncode == 0, r.stderr
    d = json.loads((tmp_path / "rep" / "score.json").read_text())
    assert (tmp_path / "rep" / "report.html").exists()
    got = {row["split"]: row for row in d["by_split"]}
    for split in ("train", "test"):
        mask = (m["split"] == split).to_numpy()
        assert got[split]["n"] == mask.sum() and got[split]["k"] == right[mask].sum()
        assert got[split]["accuracy"] == pytest.approx(right[mask].mean())


def test_score_refuses_predictions_with_unknown_ids(dataset, tmp_path):
    p = tmp_path / "pred.csv"
    pd.DataFrame({"image_id": ["nope-1", "nope-2"], "predicted": ["P3-00", "P3-01"]}).to_csv(p, index=False)
    r = run("score", dataset, p, "--out", tmp_path / "rep")
    assert r.returncode == 2
    assert r.stderr.strip().count("\n") == 0 and "nope-1" in r.stderr
    assert not (tmp_path / "rep" / "score.json").exists()


def test_score_refuses_an_empty_file(dataset, tmp_path):
    p = tmp_path / "pred.csv"
    p.write_text("")
    r = run("score", dataset, p)
    assert r.returncode == 2 and str(p) in r.stderr
