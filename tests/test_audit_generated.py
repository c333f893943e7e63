"""The audit on a dataset made by `augsplit generate` with a footprint guarantee: the clean
dataset passes every check; a test image overwritten by a train image is caught."""

import json
import shutil

import pytest

from augsplit.audit import run_audit
from augsplit.dataset import read_manifest

SPEC = """
seed: 7
canvas: {width: 128, height: 64, mode: gray}
viewing: {distance_cm: 57, px_per_cm: 10}
objects: {kind: glyphs, texts: [A, E, F, H], height_px: 14, thickness: 2}
background: {kind: pink_noise, mean: 0.5, contrast: 0.15}
axes:
  x:     {range: [-5.5, 5.5], unit: deg}
  y:     {range: [-2, 2], unit: deg}
  scale: {range: [0.8, 1.25], dist: log}
  angle: {range: [-20, 20]}
splits:
  train:   {region: {x: [-5.5, -2]}, per_class: 12}
  test:    {region: {x: [2, 5.5]}, per_class: 6}
guarantees:
  - {disjoint: footprint, between: [train, test]}
"""
AXES = {"x": (-5.5, 5.5, False), "y": (-2, 2, False), "scale": (0.8, 1.25, False, "log"), "angle": (-20, 20, False)}
CLAIMS = {"footprint_disjoint": True, "margin": 0.05}


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    generate = pytest.importorskip("augsplit.generate")
    root = tmp_path_factory.mktemp("gen")
    (root / "spec.yaml").write_text(SPEC)
    generate.generate(root / "spec.yaml", root / "out", generate.Options(progress=False))
    return root / "out"


def test_clean_generated_dataset_passes_every_check(dataset):
    res = run_audit(dataset, AXES, thresholds=CLAIMS)
    assert res.verdict == "pass", [(c.name, c.detail) for c in res.checks if c.verdict != "pass"]
    assert {c.name for c in res.checks} >= {"parameter_proximity", "footprint_overlap", "near_duplicates",
                                            "instance_leakage", "category_overlap", "declared_regions"}
    assert res.inputs["images"] == "file" and res.get("near_duplicates").numbers["n_test"] == 24


def test_train_image_copied_over_a_test_image_is_caught(dataset, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(dataset, copy)
    m = read_manifest(copy)
    src = m[m.split == "train"].iloc[3]; dst = m[m.split == "test"].iloc[2]
    shutil.copyfile(copy / src["file"], copy / dst["file"])
    nd = run_audit(copy, AXES, thresholds=CLAIMS).get("near_duplicates")
    assert nd.verdict == "fail" and nd.numbers["n_exact_duplicates"] == 1
    assert nd.worst.iloc[0]["test_id"] == dst["image_id"] and nd.worst.iloc[0]["train_id"] == src["image_id"]


def _small_demo(tmp_path):
    """The built-in demo at a tenth of its training images (30 per class) and 10 test images
    per class and lane, generated into tmp_path/ds."""
    import yaml

    from augsplit.build import open_mapping
    from augsplit.generate import Options, generate
    from augsplit.spec import builtin_spec_path

    spec = yaml.safe_load(builtin_spec_path().read_text())
    for split in spec["splits"].values():
        split["per_class"] //= 10 if split["per_class"] == 300 else 6
    out = tmp_path / "ds"
    generate(None, out, Options(progress=False, shard_size=40), built=open_mapping(spec))
    return out


def _audit(out, report):
    """`augsplit audit` of a folder: its exit code and its audit.json."""
    from augsplit.cli import main

    code = main(["audit", str(out), "--out", str(report), "--quiet"])
    return code, json.loads((report / "audit.json").read_text())


def test_a_training_image_overwritten_never_makes_an_untouched_test_image_a_copy(tmp_path):
    """Measured before: in the demo (30 and 10 images per class), train-0000007 overwritten with
    train-0000008's pixels made the audit fail near_duplicates, naming the untouched
    test_same_lane-0000001 a copy of train-0000007 (judged by the training image's distance
    from its render). A test image that is its own render is explained by its row."""
    out = _small_demo(tmp_path)
    m = read_manifest(out).set_index("image_id")
    shutil.copyfile(out / m.loc["train-0000008", "file"], out / m.loc["train-0000007", "file"])
    code, report = _audit(out, tmp_path / "report")
    assert code == 0
    near = [c for c in report["checks"] if c["name"] == "near_duplicates"]
    assert near and all(c["verdict"] == "pass" for c in near), near


@pytest.mark.parametrize("test_id", ["test_same_lane-0000001", "test_far_lane-0000002"])
def test_a_test_image_copied_over_a_training_image_is_a_copy(tmp_path, test_id):
    """The other direction: test pixels in the training split. Found by a review of the change
    above: the audit then called the pair 'pixel-identical by design' and passed."""
    out = _small_demo(tmp_path)
    m = read_manifest(out).set_index("image_id")
    shutil.copyfile(out / m.loc[test_id, "file"], out / m.loc["train-0000005", "file"])
    code, report = _audit(out, tmp_path / "report")
    assert code == 1
    lane = test_id.rsplit("-", 1)[0]
    near = [c for c in report["checks"] if c["name"] == "near_duplicates" and lane in json.dumps(c)]
    assert near and near[0]["verdict"] == "fail", near
    detail = near[0]["detail"]
    assert detail.startswith("1 test images are copied in the training split or copy train images"), detail
    assert f"e.g. train-0000005 (a training image) copies {test_id}" in detail, detail
