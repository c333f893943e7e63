"""`augsplit audit` verdicts that must never be silent or wrong: option values (one line, exit 2,
naming the option), column maps that would switch a check off, a row that does not match its
own parameters (a finding naming split and image id), and the report's histograms of every
audited pair."""

from __future__ import annotations

import json

import pyarrow as pa
import pyarrow.parquet as pq
import pandas as pd
import pytest
from lookalikes import make

from augsplit.audit.entry import audit_dataset
from augsplit.cli import main
from augsplit.dataset import open_dataset
from augsplit.dataset import read_manifest
from augsplit.render import footprint
from augsplit.scene import render_params

SPEC = {"seed": 3, "canvas": {"width": 64, "height": 48, "mode": "gray"},
        "objects": {"kind": "glyphs", "texts": ["A", "W"], "fonts": ["simplex", "triplex"], "height_px": 14},
        "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 48]}},
        "splits": {"train": {"region": {"x": [0, 20]}, "per_class": 6},
                   "test_near": {"region": {"x": [24, 40]}, "per_class": 3},
                   "test_far": {"region": {"x": [44, 64]}, "per_class": 3}},
        "guarantees": [{"disjoint": "parameters", "between": ["train", "test_far"]}]}


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    return make(SPEC, tmp_path_factory.mktemp("opts") / "data")


def audit(capsys, *args):
    code = main(["audit", *map(str, args), "--quiet"])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.mark.parametrize("value, says", [
    ("hash_radius=abc", "--threshold hash_radius: must be an integer, got 'abc'"),
    ("hash_radius=-1", "--threshold hash_radius: must be in [0, 63], got -1"),
    ("hash_radius=64", "--threshold hash_radius: must be in [0, 63]"),
    ("margin=-0.5", "--threshold margin: must be at least 0"),
    ("margin=nan", "--threshold margin: must be"),
    ("footprint_max_fraction=1.5", "--threshold footprint_max_fraction: must be in [0, 1]"),
    ("near_duplicates_fail=maybe", "--threshold near_duplicates_fail: must be true or false"),
    ("worst_k=2.5", "--threshold worst_k: must be an integer"),
    ("margin=[", "--threshold margin: must be a number"),
    ("duplicate_judge=strict", "--threshold duplicate_judge: must be one of auto, radius"),
    ("margn=0.1", "--threshold margn: unknown threshold (did you mean 'margin'?)"),
])
def test_every_threshold_value_is_typed_and_range_checked(data, tmp_path, capsys, value, says):
    code, out, err = audit(capsys, data, "--out", tmp_path / "rep", "--threshold", value)
    assert code == 2 and says in err, err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert not (tmp_path / "rep").exists()  # nothing written for bad input


def test_spec_audit_thresholds_are_checked_too(tmp_path, capsys):
    import yaml

    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump({**SPEC, "audit": {"hash_radius": 99}}, sort_keys=False))
    table = tmp_path / "t.csv"
    pd.DataFrame({"split": ["train", "test_far"], "x": [5.0, 50.0], "y": [10.0, 10.0]}).to_csv(table, index=False)
    code, _, err = audit(capsys, table, "--spec", spec, "--out", tmp_path / "rep")
    assert code == 2 and "audit.hash_radius: must be in [0, 63]" in err


@pytest.mark.parametrize("mapping, says", [
    ("bogus=file", "--map bogus: 'bogus' is not a column the audit reads"),
    ("splt=split", "(did you mean 'split'?)"),
    ("image_id=file", "--map image_id: the map takes column 'file'"),
])
def test_a_map_that_would_switch_a_check_off_is_bad_input(data, tmp_path, capsys, mapping, says):
    # before: `--map bogus=file` dropped the image column, skipped the near-duplicate check
    # and passed with exit 0
    code, out, err = audit(capsys, data, "--axis", "x=0:64", "--axis", "y=0:48", "--map", mapping,
                           "--out", tmp_path / "rep")
    assert code == 2 and says in err and err.count("\n") == 1, err


def test_a_table_without_images_shows_the_check_as_not_run(data, tmp_path, capsys):
    table = tmp_path / "t.parquet"
    read_manifest(data).drop(columns=["file", "image_bytes", "sha256"]).to_parquet(table)
    code, out, err = audit(capsys, table, "--axis", "x=0:64", "--axis", "y=0:48", "--out", tmp_path / "rep")
    assert code == 0, err
    assert "not run: near_duplicates" in out and "skipped near_duplicates (train/test_near): no images" in out
    doc = json.loads((tmp_path / "rep" / "audit.json").read_text())
    assert {s["name"] for s in doc["skipped"]} == {"near_duplicates"}
    assert all(c["name"] != "near_duplicates" for c in doc["checks"])


def _flip_instance_breaking_bbox(root):
    """A test row whose other font instance renders a footprint of another size than its bbox:
    its manifest row is rewritten with that instance and the bbox kept."""
    built = open_dataset(root).built
    m = read_manifest(root)
    hw = (built.spec.canvas.height, built.spec.canvas.width)
    for _, row in m[m["split"] == "test_far"].iterrows():
        other = 1 - int(row["instance"])
        mask = footprint(built.source.sprite(int(row["class_index"]), other), render_params(row), hw).mask
        if mask.shape != (row["bbox_y1"] - row["bbox_y0"], row["bbox_x1"] - row["bbox_x0"]):
            break
    else:
        pytest.fail("no row whose other instance changes the bbox")
    for part in sorted((root / "manifest" / "split=test_far").glob("*.parquet")):
        t = pq.read_table(part)
        df = t.to_pandas()
        hit = df["image_id"] == row["image_id"]
        if hit.any():
            df.loc[hit, "instance"] = other
            pq.write_table(pa.Table.from_pandas(df, schema=t.schema, preserve_index=False), part)
    return row["image_id"], mask.shape


def test_a_row_that_does_not_match_its_bbox_is_a_finding_naming_split_and_image(data, tmp_path, capsys):
    import shutil

    root = tmp_path / "data"
    shutil.copytree(data, root)
    image_id, shape = _flip_instance_breaking_bbox(root)
    code, out, err = audit(capsys, root, "--out", tmp_path / "rep")
    assert code == 1, err  # before: exit 2, "row 0: mask shape ... does not match its bbox"
    doc = json.loads((tmp_path / "rep" / "audit.json").read_text())
    bad = [c for c in doc["checks"] if c["name"] == "row_integrity" and c["verdict"] == "fail"]
    assert [c["pair"] for c in bad] == [["train", "test_far"]]
    w = bad[0]["worst"][0]
    assert w["split"] == "test_far" and w["id"] == image_id and f"mask shape {shape}" in w["reason"]
    assert image_id in bad[0]["detail"] and "test_far" in bad[0]["detail"]


def test_an_instance_the_source_does_not_have_is_a_finding(data, tmp_path, capsys):
    import shutil

    root = tmp_path / "data"
    shutil.copytree(data, root)
    part = sorted((root / "manifest" / "split=test_near").glob("*.parquet"))[0]
    t = pq.read_table(part)
    df = t.to_pandas()
    df.loc[0, "instance"] = 7
    pq.write_table(pa.Table.from_pandas(df, schema=t.schema, preserve_index=False), part)
    code, out, err = audit(capsys, root, "--out", tmp_path / "rep")
    assert code == 1 and "Traceback" not in err, err  # before: an IndexError traceback
    doc = json.loads((tmp_path / "rep" / "audit.json").read_text())
    bad = next(c for c in doc["checks"] if c["name"] == "row_integrity" and c["verdict"] == "fail")
    assert bad["worst"][0]["id"] == df.loc[0, "image_id"] and "has 2 instance(s), asked for 7" in bad["worst"][0]["reason"]


def test_parameter_histograms_hold_every_audited_split(data):
    # the HTML's "Parameters by split" draws these counts, one line per split
    result = audit_dataset(data, thresholds={"category_pairs": 50})
    assert {p[1] for p in result.pairs} == {"test_near", "test_far"}
    for axis, h in result.arrays["axis_hist"].items():
        assert set(h["counts"]) == {"train", "test_near", "test_far"}, axis
        m = read_manifest(data)
        assert {k: int(v.sum()) for k, v in h["counts"].items()} == m["split"].value_counts().to_dict()
