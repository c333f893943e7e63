"""`augsplit preview`: contact sheets and the coverage map. The coverage counts are checked
against the manifest's own footprint sizes and bounding boxes; the overlay marks every pixel
both roles touch; pictures are readable PNGs; every store mode previews the same pixels."""

from __future__ import annotations

import cv2
import numpy as np
import pytest

from augsplit import preview as pv
from augsplit.cli import main
from augsplit.dataset import image_of, open_dataset, read_manifest
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from specs import write_spec

SPEC = {
    "seed": 23,
    "canvas": {"width": 40, "height": 40, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [220, 40, 40]},
    "background": {"kind": "solid", "value": 0.9},
    "axes": {"x": {"range": [4, 36]}, "y": {"range": [4, 36]}, "angle": {"range": [0, 360]},
             "hue": {"range": [0, 360]}},
    "splits": {"train": {"region": {"x": [4, 12]}, "count": 30}, "test": {"region": {"x": [28, 36]}, "count": 12},
               "iid": {"region": {"split": "train"}, "count": 8}},
    "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}],
}


@pytest.fixture(scope="module")
def datasets(tmp_path_factory):
    root = tmp_path_factory.mktemp("prev")
    spec = write_spec(root, SPEC)
    out = {}
    for store in ("files", "parquet", "none"):
        out[store] = root / store
        generate(spec, out[store], Options(store=store, progress=False))
    return out


def test_preview_writes_a_sheet_per_split_and_the_coverage_map(datasets):
    paths = pv.preview(datasets["files"], per_split=6, columns=3)
    names = [p.name for p in paths]
    assert names == ["contact_train.png", "contact_test.png", "contact_iid.png", "coverage.png"]
    for p in paths:
        assert p.parent == datasets["files"] / pv.PREVIEW_DIR
        img = cv2.imread(str(p))
        assert img is not None and img.shape[0] > 150 and img.shape[1] > 150
        assert img.std() > 5  # not a blank page


def test_coverage_counts_match_the_manifest_footprints(datasets):
    """Each split's map sums to the sum of its rows' footprint_px, and lies inside the union of
    their bounding boxes: the map is the renderer's footprints, not an approximation."""
    built = open_dataset(datasets["files"]).built
    df = read_manifest(datasets["files"])
    cov = pv.coverage(built, df)
    for name, counts in cov.counts.items():
        rows = df[df["split"] == name]
        assert counts.sum() == rows["footprint_px"].sum()
        inside = np.zeros_like(counts, dtype=bool)
        for r in rows.itertuples():
            inside[r.bbox_y0:r.bbox_y1, r.bbox_x0:r.bbox_x1] = True
        assert not (counts[~inside] > 0).any()
        assert cov.sampled[name] == (len(rows), len(rows))
    # the spec guarantees disjoint footprints between train and test; the iid split shares train's region
    assert not ((cov.counts["train"] > 0) & (cov.counts["test"] > 0)).any()
    assert ((cov.counts["train"] > 0) & (cov.counts["iid"] > 0)).any()
    assert pv.footprint_guarantee(built, "test") == pv.ALL and pv.footprint_guarantee(built, "iid") is None


def test_coverage_samples_large_splits_evenly(datasets):
    built = open_dataset(datasets["files"]).built
    cov = pv.coverage(built, read_manifest(datasets["files"]), max_rows=5)
    assert cov.sampled["train"] == (5, 30)


def test_overlay_colours_each_role_and_blacks_out_shared_pixels():
    train = np.array([[0, 3, 1], [0, 0, 0]])
    test = np.array([[0, 0, 2], [5, 0, 0]])
    rgb = pv.overlay(train, test)
    assert np.allclose(rgb[0, 0], 1.0) and np.allclose(rgb[1, 1], 1.0)  # untouched: white
    assert np.allclose(rgb[0, 2], 0.0)  # touched by both: black
    assert rgb[0, 1, 2] > rgb[0, 1, 0]  # train only: blue dominates
    assert rgb[1, 0, 0] > rgb[1, 0, 2]  # test only: red/orange dominates
    # a pixel touched once stays visible beside one touched many times (log scale, floor 0.25)
    few = pv.overlay(np.array([[1, 1000]]), None)
    assert (few[0, 0] < 0.9).any()


def test_every_store_previews_the_same_pixels(datasets):
    """Files decode, Parquet bytes decode, and --store none re-renders: the same image."""
    dfs = {k: read_manifest(v) for k, v in datasets.items()}
    folders = {k: open_dataset(v) for k, v in datasets.items()}
    for i in (0, 17, 45):
        imgs = [image_of(folders[k], dfs[k].iloc[i]) for k in ("files", "parquet", "none")]
        assert np.array_equal(imgs[0], imgs[1]) and np.array_equal(imgs[0], imgs[2])


def test_pick_rows_spreads_over_the_split():
    assert list(pv.pick_rows(5, 10)) == [0, 1, 2, 3, 4]
    p = pv.pick_rows(1000, 8)
    assert len(p) == 8 and p.min() < 125 and p.max() >= 875 and np.all(np.diff(p) > 0)


def test_caption_names_the_class_and_every_varied_axis(datasets):
    built = open_dataset(datasets["files"]).built
    row = read_manifest(datasets["files"]).iloc[3]
    text = pv.caption(built, row)
    assert text.splitlines()[0].startswith(row["class_name"])
    assert f"x {row['x']:.1f} px" in text and f"angle {row['angle']:.1f}°" in text and f"hue {row['hue']:.1f}°" in text


def test_cli_preview_with_out_folder(datasets, tmp_path, capsys):
    code = main(["preview", str(datasets["none"]), "--out", str(tmp_path / "pics"), "--per-split", "4"])
    printed = capsys.readouterr().out.split()
    assert code == 0 and len(printed) == 4
    assert all((tmp_path / "pics" / p.split("/")[-1]).exists() for p in printed)


def test_cli_preview_of_a_folder_that_is_no_dataset_is_exit_2(tmp_path, capsys):
    code = main(["preview", str(tmp_path)])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "spec.json" in err


def test_preview_needs_at_least_one_image(datasets):
    with pytest.raises(DatasetError, match="at least one image"):
        pv.preview(datasets["files"], per_split=0)


# ---- per-class guarantees --------------------------------------------------------------------

PER_CLASS_SPEC = {
    "seed": 31,
    "canvas": {"width": 48, "height": 48, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [220, 40, 40]},
    "background": {"kind": "solid", "value": 0.9},
    "axes": {"x": {"range": [6, 42]}, "y": {"range": [6, 42]}},
    "splits": {"train": {"per_class": 8, "region": {"by_class": {"P3-00": {"x": [6, 14]}, "P3-01": {"x": [34, 42]}}}},
               "test": {"per_class": 8, "region": {"by_class": {"P3-00": {"x": [34, 42]}, "P3-01": {"x": [6, 14]}}}}},
    "guarantees": [{"disjoint": "footprint", "between": ["train", "test"], "per_class": True}],
}


@pytest.fixture(scope="module")
def per_class(tmp_path_factory):
    root = tmp_path_factory.mktemp("prev_pc")
    out = root / "data"
    generate(write_spec(root, PER_CLASS_SPEC), out, Options(store="none", progress=False))
    return out


def test_a_per_class_guarantee_compares_same_class_pixels_only(per_class):
    """Each class is trained where the other is tested: pixels are shared across classes (the
    class-blind count is large) but never within one class, which is all the guarantee says."""
    built = open_dataset(per_class).built
    df = read_manifest(per_class)
    cov = pv.coverage(built, df)
    assert pv.footprint_guarantee(built, "test") == pv.PER_CLASS
    assert cov.shared("test", per_class=False).sum() > 20
    assert cov.shared("test", per_class=True).sum() == 0
    # the per-class masks are the class-blind counts split by class: they add back up
    for name, counts in cov.counts.items():
        assert np.array_equal(np.sum([m for m in cov.by_class[name].values()], axis=0) > 0, counts > 0)


def test_same_class_sharing_is_counted_pixel_by_pixel():
    # hand-made masks: class 0 shares pixel (0, 0); class 1 of train meets class 0 of test at (1, 1)
    z = np.zeros((2, 2), bool)
    tr0, tr1, te0 = z.copy(), z.copy(), z.copy()
    tr0[0, 0] = True
    tr1[1, 1] = True
    te0[0, 0] = te0[1, 1] = True
    cov = pv.Coverage({"train": (tr0 | tr1).astype(int), "test": te0.astype(int)}, {}, {"train": "train", "test": "test"},
                      {"train": {0: tr0, 1: tr1}, "test": {0: te0}})
    assert cov.shared("test", per_class=True).tolist() == [[True, False], [False, False]]
    assert cov.shared("test", per_class=False).tolist() == [[True, False], [False, True]]


def test_preview_leaves_the_callers_backend_alone(per_class, tmp_path):
    import matplotlib
    import matplotlib.pyplot as plt

    before = matplotlib.get_backend()
    matplotlib.use("svg")
    try:
        pv.preview(per_class, out=tmp_path / "p", per_split=2)
        assert matplotlib.get_backend() == "svg" and plt.get_fignums() == []
    finally:
        matplotlib.use(before)


def test_preview_option_errors_name_the_option(per_class, capsys):
    assert main(["preview", str(per_class), "--per-split", "0"]) == 2
    assert "--per-split" in capsys.readouterr().err
    assert main(["preview", str(per_class), "--columns", "-1"]) == 2
    assert "--columns" in capsys.readouterr().err
