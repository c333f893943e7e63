"""`augsplit audit` end to end: a clean generated dataset passes its claims, planted leaks
fail with exit 1, bad input exits 2 with one line."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from specs import spec_dict

from augsplit.build import open_mapping
from augsplit.dataset import read_manifest
from augsplit.generate import Options, generate

SPEC = spec_dict(
    canvas={"width": 64, "height": 64, "mode": "rgb"},
    background={"kind": "uniform_noise", "lo": 0.0, "hi": 0.4},
    axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
    splits={"train": {"region": {"x": [0, 22]}, "per_class": 12},
            "test": {"region": {"x": [42, 64]}, "per_class": 6}},
    guarantees=[{"disjoint": "footprint", "between": ["train", "test"]}],
)


def run(*args):
    return subprocess.run([sys.executable, "-m", "augsplit.cli", *map(str, args)], capture_output=True, text=True,
                          timeout=300)


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    out = tmp_path_factory.mktemp("audit") / "data"
    generate(None, out, Options(progress=False), built=open_mapping(SPEC))
    return out


def test_clean_dataset_passes(clean, tmp_path):
    r = run("audit", clean, "--quiet", "--out", tmp_path / "rep")
    assert r.returncode == 0, r.stdout + r.stderr
    d = json.loads((tmp_path / "rep" / "audit.json").read_text())
    assert d["verdict"] in ("pass", "warn")
    names = {c["name"] for c in d["checks"]}
    assert {"footprint_overlap", "near_duplicates", "parameter_proximity", "declared_regions"} <= names
    assert (tmp_path / "rep" / "audit.html").read_text().count("data:image/png;base64") >= 2


def test_copied_image_is_caught(clean, tmp_path):
    leak = tmp_path / "leak"
    shutil.copytree(clean, leak)
    m = read_manifest(leak)
    src = m[m["split"] == "train"].iloc[0]["file"]
    dst = m[m["split"] == "test"].iloc[3]
    shutil.copy(leak / src, leak / dst["file"])
    r = run("audit", leak, "--quiet", "--out", tmp_path / "rep")
    assert r.returncode == 1
    d = json.loads((tmp_path / "rep" / "audit.json").read_text())
    dup = next(c for c in d["checks"] if c["name"] == "near_duplicates")
    assert dup["verdict"] == "fail" and dup["numbers"]["n_exact_duplicates"] >= 1
    assert dst["image_id"] in json.dumps(dup)


def test_table_without_split_column(tmp_path):
    p = tmp_path / "t.csv"
    pd.DataFrame({"x": [1.0, 2.0]}).to_csv(p, index=False)
    r = run("audit", p, "--axis", "x=0:64", "--quiet", "--out", tmp_path / "rep")
    assert r.returncode == 2 and r.stderr.strip().count("\n") == 0 and "split" in r.stderr


def test_nan_parameters_are_reported_not_dropped(tmp_path):
    rng = np.random.default_rng(0)
    df = pd.DataFrame({"split": ["train"] * 50 + ["test"] * 20, "x": np.r_[rng.uniform(0, 20, 50), rng.uniform(40, 64, 20)]})
    df.loc[55, "x"] = np.nan
    p = tmp_path / "t.parquet"
    df.to_parquet(p)
    r = run("audit", p, "--axis", "x=0:64", "--quiet", "--out", tmp_path / "rep")
    assert r.returncode == 1
    d = json.loads((tmp_path / "rep" / "audit.json").read_text())
    fin = next(c for c in d["checks"] if c["name"] == "finite_values")
    assert fin["verdict"] == "fail" and "55" in json.dumps(fin)


def test_parameter_log_against_spec(tmp_path):
    spec = tmp_path / "spec.yaml"
    import yaml

    spec.write_text(yaml.safe_dump(SPEC))
    rng = np.random.default_rng(1)
    n = 400
    log = pd.DataFrame({"split": "train", "x": rng.uniform(0, 22, n), "y": rng.uniform(0, 64, n),
                        "angle": rng.uniform(0, 360, n), "class_name": "P3-00", "epoch": 0, "item": np.arange(n)})
    (tmp_path / "log").mkdir()
    log.to_parquet(tmp_path / "log" / "part-0.parquet")
    r = run("audit", tmp_path / "log", "--spec", spec, "--quiet", "--out", tmp_path / "rep")
    assert r.returncode == 0, r.stdout + r.stderr
    log.loc[7, "x"] = 50.0  # a training draw inside the held-out region
    log.to_parquet(tmp_path / "log" / "part-0.parquet")
    r = run("audit", tmp_path / "log", "--spec", spec, "--quiet", "--out", tmp_path / "rep")
    assert r.returncode == 1
    d = json.loads((tmp_path / "rep" / "audit.json").read_text())
    lr = next(c for c in d["checks"] if c["name"] == "log_regions")
    assert lr["numbers"]["train_rows_inside_held_out_regions"] == 1


def test_unknown_pair_names_the_splits(clean, tmp_path):
    r = run("audit", clean, "--pair", "train:tset", "--quiet", "--out", tmp_path / "rep")
    assert r.returncode == 2 and "tset" in r.stderr and "test" in r.stderr
