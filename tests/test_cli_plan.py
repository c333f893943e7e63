"""`augsplit plan` and `augsplit assign` through the real command line."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = sorted((ROOT / "configs").glob("*.yaml"))


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "augsplit.cli", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd or ROOT, timeout=120)


@pytest.mark.parametrize("config", CONFIGS, ids=[c.stem for c in CONFIGS])
def test_plan_every_config(config):
    r = run("plan", config, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert {s["name"] for s in d["splits"]} >= {"train"}
    assert all(g["verdict"] in ("proved", "guarded") for g in d["guarantees"])
    for s in d["splits"]:
        assert 0 < s["mass"] <= 1 and s["images"] > 0
        assert s["kind"] == "train" or s["kind"] in ("random", "interpolation", "extrapolation", "composition")
    text = run("plan", config)
    assert text.returncode == 0 and "split train" in text.stdout


def test_configs_cover_the_four_scenarios():
    kinds = {}
    for c in CONFIGS:
        d = json.loads(run("plan", c, "--json").stdout)
        for s in d["splits"]:
            kinds.setdefault(s["kind"], []).append(c.stem)
        for g in d["guarantees"]:
            kinds.setdefault(f"{g['disjoint']}{'_per_class' if g['per_class'] else ''}", []).append(c.stem)
    assert {"extrapolation", "composition", "footprint", "footprint_per_class"} <= set(kinds)


def test_plan_demo_keyword():
    r = run("plan", "demo")
    assert r.returncode == 0 and "PROVED" in r.stdout


def test_bad_spec_gives_one_line_and_exit_2(tmp_path):
    p = tmp_path / "bad.yaml"
    p.write_text("seed: 1\ncanvas: {width: 64, height: 64}\nobjects: {kind: polyomino, cells: 3, cell_px: 4}\n"
                 "axes: {x: {range: [0, 64]}}\nsplits: {train: {region: {x: [30, 10]}, per_class: 2}}\n")
    r = run("plan", p)
    assert r.returncode == 2
    assert r.stderr.strip().count("\n") == 0
    assert "splits.train.region.x: interval [30, 10] is empty" in r.stderr
    assert "Traceback" not in r.stderr


def test_refused_guarantee_exit_2_with_numbers(tmp_path):
    p = tmp_path / "close.yaml"
    p.write_text("seed: 1\ncanvas: {width: 64, height: 64}\nobjects: {kind: polyomino, cells: 4, cell_px: 4}\n"
                 "axes: {x: {range: [0, 64]}, angle: {range: [0, 360]}}\n"
                 "splits: {train: {region: {x: [0, 30]}, per_class: 2}, test: {region: {x: [33, 64]}, per_class: 2}}\n"
                 "guarantees: [{disjoint: footprint, between: [train, test]}]\n")
    r = run("plan", p)
    assert r.returncode == 2
    assert "position gap 3.00 px" in r.stderr and "px needed" in r.stderr


def _demo_table(n=200, seed=0):
    rng = np.random.default_rng(seed)
    # the demo's axis ranges (augsplit/builtin/demo.yaml)
    return pd.DataFrame({"x": rng.uniform(10, 54, n), "y": rng.uniform(7, 57, n), "scale": rng.uniform(0.9, 1.1, n),
                         "angle": rng.uniform(-10, 10, n)})


def test_assign_labels_rows_by_region(tmp_path):
    df = _demo_table()
    src = tmp_path / "rows.csv"
    df.to_csv(src, index=False)
    r = run("assign", "demo", src, "--out", tmp_path / "out.csv")
    assert r.returncode == 0, r.stderr
    out = pd.read_csv(tmp_path / "out.csv")
    # the first split in spec order wins where regions overlap (train before test_same_lane)
    expect = np.where(df["y"] <= 20, "train", np.where(df["y"] >= 44, "test_far_lane", "none"))
    assert (out["split"].to_numpy() == expect).all()


def test_assign_from_bboxes(tmp_path):
    df = _demo_table()
    w = 6.0
    boxes = pd.DataFrame({"bbox_x0": df["x"] - w, "bbox_y0": df["y"] - w, "bbox_x1": df["x"] + w, "bbox_y1": df["y"] + w,
                          "bbox_w_ignored": 0})
    src = tmp_path / "boxes.parquet"
    boxes.to_parquet(src)
    r = run("assign", "demo", src, "--ref-size", 12, "--out", tmp_path / "out.parquet")
    assert r.returncode == 0, r.stderr
    out = pd.read_parquet(tmp_path / "out.parquet")
    expect = np.where(df["y"] <= 20, "train", np.where(df["y"] >= 44, "test_far_lane", "none"))
    assert (out["split"].to_numpy() == expect).all()


def test_assign_missing_column(tmp_path):
    src = tmp_path / "rows.csv"
    pd.DataFrame({"x": [10.0], "scale": [1.0]}).to_csv(src, index=False)
    r = run("assign", "demo", src)
    assert r.returncode == 2
    assert "has no column 'y' (or bbox_x0, bbox_y0, bbox_x1, bbox_y1" in r.stderr and str(src) in r.stderr
    assert not (tmp_path / "rows.assigned.csv").exists()


def test_assign_missing_file(tmp_path):
    r = run("assign", "demo", tmp_path / "nope.csv")
    assert r.returncode == 2 and "no such file" in r.stderr


def test_assign_refuses_values_that_are_not_numbers(tmp_path):
    src = tmp_path / "rows.csv"
    pd.DataFrame({"x": [10.0, 11.0, 12.0], "y": ["abc", "10", None]}).to_csv(src, index=False)
    r = run("assign", "demo", src)
    assert r.returncode == 2
    assert "column 'y' holds values that are not finite numbers (rows 0, 2" in r.stderr
    assert not (tmp_path / "rows.assigned.csv").exists()
