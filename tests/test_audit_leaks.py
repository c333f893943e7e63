"""Planted leaks are found and named; a clean split passes; bad inputs give one-line errors."""

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import cv2
import pytest

from augsplit.audit import Thresholds, run_audit, apply_column_map
from synthetic import AXES, make_dataset, plant
from augsplit.errors import DatasetError
from augsplit.space import Axis, Region, Space

# On these 64 px noisy tiles a 1 px shift moves the perceptual hash by up to 10 bits while
# distinct images stay >= 16 bits apart (measured on make_dataset, seeds 0-3): radius 10.
TH = Thresholds(margin=0.05, footprint_disjoint=True, hash_radius=10)


@pytest.fixture(scope="module")
def clean():
    return make_dataset(n_train=120, n_test=60, seed=3)


def _regions():
    space = Space([Axis("x", 0.0, 64.0)])
    return {"train": Region.box(space, {"x": [(8.0, 22.0)]}), "test": Region.box(space, {"x": [(42.0, 56.0)]})}


def _audit(ds, **kw):
    kw.setdefault("thresholds", TH)
    return run_audit(ds.table, AXES, image_loader=ds.image_loader, mask_loader=ds.mask_loader,
                     regions=_regions(), **kw)


def _verdicts(res):
    return {c.name: c.verdict for c in res.checks}


def test_clean_split_passes_every_check(clean):
    res = _audit(clean)
    assert res.verdict == "pass" and res.exit_code == 0, [(c.name, c.detail) for c in res.failed()]
    assert set(_verdicts(res)) == {"finite_values", "declared_regions", "parameter_proximity", "footprint_overlap",
                                   "category_overlap", "near_duplicates", "instance_leakage", "row_integrity"}
    assert not res.skipped
    # lanes 20 px apart: same-class pixels across the splits never coincide (the hard case)
    assert res.get("category_overlap").numbers["mean_iou_same_class_across"] == 0.0


def test_copied_image_is_found_and_named(clean):
    ds, row = plant(clean, "copy")
    res = _audit(ds)
    nd = res.get("near_duplicates")
    assert nd.verdict == "fail" and nd.numbers["n_exact_duplicates"] == 1
    assert nd.worst.iloc[0]["test_id"] == ds.table["image_id"][row] and bool(nd.worst.iloc[0]["exact_copy"])
    assert nd.worst.iloc[0]["train_id"] == "train-0000000"
    assert res.exit_code == 1


def test_image_shifted_by_one_pixel_is_found(clean):
    ds, row = plant(clean, "shift")
    nd = _audit(ds).get("near_duplicates")
    assert nd.verdict == "fail" and nd.numbers["n_exact_duplicates"] == 0 and nd.numbers["n_near_duplicates"] == 1
    assert nd.worst.iloc[0]["test_row"] == row and nd.worst.iloc[0]["train_id"] == "train-0000000"
    assert 0 <= nd.worst.iloc[0]["hamming"] <= TH.hash_radius


def test_train_row_moved_into_test_region_is_found(clean):
    ds, row = plant(clean, "moved")
    res = _audit(ds)
    reg = res.get("declared_regions")
    assert reg.verdict == "fail" and reg.numbers["n_a_inside_other_region"] == 1
    assert "1 train rows lie inside the other split's region" in reg.detail
    assert reg.worst.iloc[0]["row"] == row and reg.worst.iloc[0]["id"] == ds.table["image_id"][row]
    fp = res.get("footprint_overlap")
    assert fp.verdict == "fail" and (fp.worst["train_row"] == row).any()


def test_moved_parameters_fail_the_margin(clean):
    t = clean.table.copy()
    test_rows = np.flatnonzero(t["split"] == "test")
    t.loc[0, list(AXES)] = t.loc[test_rows[4], list(AXES)].to_numpy()  # a train row at a test row's parameters
    t.loc[0, "class_name"] = t.loc[test_rows[4], "class_name"]
    res = run_audit(t, AXES, thresholds=TH)
    prox = res.get("parameter_proximity")
    assert prox.verdict == "fail" and prox.numbers["n_below_margin"] == 1
    assert prox.worst.iloc[0]["test_row"] == test_rows[4] and prox.worst.iloc[0]["train_row"] == 0


def test_reused_unseen_instance_is_found_and_named(clean):
    ds, row = plant(clean, "instance")
    inst = _audit(ds).get("instance_leakage")
    cls = ds.table["class_name"][row]
    assert inst.verdict == "fail" and inst.numbers["leaked"] == [{"class": cls, "instance": 1}]
    assert f"{cls}#1" in inst.detail and (inst.worst["train_row"] == row).all()


def test_without_spec_or_images_checks_are_skipped_with_reasons(clean):
    res = run_audit(clean.table.drop(columns=["sha256"]), AXES)
    skipped = {s.name: s.reason for s in res.skipped}
    assert "near_duplicates" in skipped and "image" in skipped["near_duplicates"]
    assert res.get("declared_regions").numbers["source"] == "data"
    assert res.get("footprint_overlap").numbers["claim"] is None


def test_precomputed_hash_column_is_used(clean):
    from augsplit.audit.phash import phash, uint64_to_hex
    t = clean.table.copy()
    t["phash"] = uint64_to_hex([phash(im) for im in clean.images])
    t.loc[t.index[-1], "phash"] = t.loc[0, "phash"]
    nd = run_audit(t, AXES).get("near_duplicates")
    assert nd.numbers["n_near_duplicates"] == 1 and nd.worst.iloc[0]["train_row"] == 0


# ---- files and streaming ----------------------------------------------------------------

def _encode(img):
    ok, buf = cv2.imencode(".png", cv2.cvtColor(img, cv2.COLOR_RGB2BGR))
    return buf.tobytes()


def test_parquet_with_embedded_images_streams_and_matches_in_memory(clean, tmp_path):
    ds, row = plant(clean, "copy")
    t = ds.table.copy()
    t["image_bytes"] = [_encode(im) for im in ds.images]
    path = tmp_path / "m.parquet"
    pq.write_table(pa.Table.from_pandas(t), path, row_group_size=32)  # many row groups
    from_file = run_audit(path, AXES, thresholds=TH)
    in_memory = run_audit(ds.table, AXES, thresholds=TH, image_loader=ds.image_loader)
    for name in ("near_duplicates", "parameter_proximity", "footprint_overlap"):
        assert from_file.get(name).numbers == in_memory.get(name).numbers
    assert from_file.get("near_duplicates").verdict == "fail"


def test_hive_partitioned_folder_and_image_files(clean, tmp_path):
    t = clean.table.copy()
    t["file"] = [f"images/{i}.png" for i in t["image_id"]]
    (tmp_path / "images").mkdir()
    for f, im in zip(t["file"], clean.images):
        cv2.imwrite(str(tmp_path / f), cv2.cvtColor(im, cv2.COLOR_RGB2BGR))
    for split, g in t.groupby("split"):
        d = tmp_path / "manifest" / f"split={split}"; d.mkdir(parents=True)
        pq.write_table(pa.Table.from_pandas(g.drop(columns="split"), preserve_index=False), d / "part-0.parquet")
    res = run_audit(tmp_path, AXES, thresholds=TH)
    assert res.verdict == "pass" and res.inputs["rows_per_split"] == {"test": 60, "train": 120}
    assert res.get("near_duplicates").numbers["n_test"] == 60
    (tmp_path / t["file"].iloc[5]).unlink()
    with pytest.raises(DatasetError) as e:
        run_audit(tmp_path, AXES)
    assert t["file"].iloc[5] in str(e.value) and "missing on disk" in str(e.value)


def test_csv_with_column_map(clean, tmp_path):
    t = clean.table.drop(columns=["sha256"]).rename(columns={"split": "phase", "x": "pos_x"})
    t.to_csv(tmp_path / "log.csv", index=False)
    res = run_audit(tmp_path / "log.csv", {**AXES, "x": AXES["x"]}, column_map={"split": "phase", "x": "pos_x"},
                    thresholds=TH)
    assert res.get("parameter_proximity").verdict == "pass"
    assert list(apply_column_map(t.head(2), {"split": "phase"}).columns)[t.columns.get_loc("phase")] == "split"


# ---- bad input ------------------------------------------------------------------------------

def _where(exc):
    return exc.value.where


def test_bad_inputs_give_one_line_errors_naming_where(clean):
    t = clean.table
    with pytest.raises(DatasetError) as e:
        run_audit(t.drop(columns=["split"]), AXES)
    assert _where(e) == "column 'split'" and "\n" not in str(e.value)
    with pytest.raises(DatasetError) as e:
        run_audit(t, AXES, column_map={"split": "phase"})
    assert _where(e) == "column_map.split" and "'phase'" in str(e.value)
    with pytest.raises(DatasetError) as e:
        run_audit(t, {**AXES, "angle": (None, None, True)})
    assert _where(e) == "axes.angle" and "period" in str(e.value)
    with pytest.raises(DatasetError) as e:
        run_audit(t, {**AXES, "tilt": (0, 1, False)})
    assert _where(e) == "axes.tilt"
    with pytest.raises(DatasetError) as e:
        run_audit(t, AXES, pairs=[("train", "holdout")])
    assert _where(e) == "split 'holdout'" and "no rows" in str(e.value)
    with pytest.raises(DatasetError) as e:
        run_audit(t, AXES, thresholds={"margn": 0.1})
    assert _where(e) == "thresholds.margn"


def test_nan_and_inf_parameters_are_reported_not_dropped(clean):
    t = clean.table.copy()
    t.loc[3, "x"] = np.nan
    t.loc[150, "hue"] = np.inf
    res = run_audit(t, AXES, thresholds=TH)
    fin = res.get("finite_values")
    assert fin.verdict == "fail" and fin.numbers["bad_rows"] == [3, 150]
    assert list(fin.worst["id"]) == [t["image_id"][3], t["image_id"][150]]
    assert fin.numbers["per_column"]["x"] == 1 and fin.numbers["per_column"]["hue"] == 1
    prox = res.get("parameter_proximity")
    assert prox.numbers["distance"]["n"] == 59 and "2 rows with non-finite values excluded" in prox.detail
    assert res.exit_code == 1


def test_missing_axis_range_comes_from_data(clean):
    res = run_audit(clean.table, {**AXES, "y": (None, None, False)})
    assert any(n.startswith("y: range") for n in res.inputs["notes"])


def test_axes_from_augsplit_axis_objects_match_tuples(clean):
    from augsplit.space.axes import CIRCULAR, LEVELS, LOG
    t = clean.table.copy()
    t["mirror"] = np.arange(len(t)) % 2
    axes = {"x": Axis("x", 0.0, 64.0), "scale": Axis("scale", 0.8, 1.2, LOG), "angle": Axis("angle", 0.0, 360.0, CIRCULAR),
            "mirror": Axis("mirror", 0.0, 1.0, LEVELS, levels=(0.0, 1.0))}
    tuples = {"x": (0, 64, False), "scale": (0.8, 1.2, False, "log"), "angle": (0, 360, True), "mirror": (0, 1, False)}
    a = run_audit(t, axes, thresholds=TH).get("parameter_proximity").numbers
    b = run_audit(t, tuples, thresholds=TH).get("parameter_proximity").numbers
    assert a == b


def test_column_map_replaces_a_same_named_column():
    df = pd.DataFrame({"split": ["a"], "x": [1.0], "pos_x": [2.0]})
    out = apply_column_map(df, {"x": "pos_x"})
    assert list(out.columns) == ["split", "x"] and out["x"].iloc[0] == 2.0
