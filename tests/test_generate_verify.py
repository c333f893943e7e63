"""`augsplit verify` on generated datasets: it passes on what generate made, in every store
mode, and names what differs (exit 1) when an image, a row, a checksum, a count or a pixel
has been tampered with."""

from __future__ import annotations

import shutil
from pathlib import Path

import cv2
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from augsplit.cli import main
from augsplit.errors import DatasetError
from augsplit.dataset import layout as lay
from augsplit.generate import Options, generate
from augsplit.verify import verify
from specs import write_spec

SPEC = {
    "seed": 29,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [60, 200, 90]},
    "background": {"kind": "gaussian_noise", "mean": 0.5, "sd": 0.1},
    "axes": {"x": {"range": [5, 19]}, "y": {"range": [5, 19]}, "hue": {"range": [0, 360]}},
    "splits": {"train": {"region": {"y": [5, 10]}, "count": 12}, "test": {"region": {"y": [14, 19]}, "count": 6}},
}


@pytest.fixture(scope="module")
def made(tmp_path_factory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("verify")
    spec = write_spec(root, SPEC)
    out = {}
    for store in ("files", "parquet", "none"):
        out[store] = root / store
        generate(spec, out[store], Options(store=store, shard_size=5, progress=False))
    return out


@pytest.fixture()
def copy(made, tmp_path) -> Path:
    dst = tmp_path / "ds"
    shutil.copytree(made["files"], dst)
    return dst


def problems(root: Path) -> str:
    rep = verify(root)
    assert not rep.ok
    return "\n".join(rep.problems)


@pytest.mark.parametrize("store", ["files", "parquet", "none"])
def test_what_generate_makes_verifies(made, store):
    rep = verify(made[store])
    assert rep.ok, rep.problems
    assert rep.checked == rep.rerendered == 18


def test_cli_verify_exit_codes(made, copy, capsys):
    assert main(["verify", str(made["files"])]) == 0
    assert "OK (18 rows checked, 18 re-rendered identically)" in capsys.readouterr().out
    next((copy / lay.IMAGES_DIR / "test").glob("*.png")).unlink()
    assert main(["verify", str(copy)]) == 1
    assert "missing" in capsys.readouterr().out


def test_a_missing_image_is_named(copy):
    victim = copy / lay.IMAGES_DIR / "train" / "train-0000003.png"
    victim.unlink()
    assert "images/train/train-0000003.png" in problems(copy)


def test_an_image_without_a_row_is_named(copy):
    shutil.copyfile(copy / lay.IMAGES_DIR / "train" / "train-0000003.png", copy / lay.IMAGES_DIR / "train" / "stray.png")
    assert "stray.png" in problems(copy)


def test_changed_pixels_fail_the_checksum(copy):
    p = copy / lay.IMAGES_DIR / "test" / "test-0000002.png"
    img = cv2.imread(str(p))
    img[0, 0] = 255 - img[0, 0]
    cv2.imwrite(str(p), img)
    assert "test-0000002" in problems(copy)


def test_a_missing_shard_fails_the_counts(copy):
    lay.part_path(copy, lay.MANIFEST_DIR, "train", 1).unlink()
    text = problems(copy)
    assert "split train: 7 rows, the plan says 12" in text
    assert "image without a row" in text  # its five images are now orphans


def test_an_edited_parameter_fails_the_re_render(copy):
    """A row whose recorded transform no longer matches its image (stored checksum intact)."""
    part = lay.part_path(copy, lay.MANIFEST_DIR, "test", 0)
    t = pq.read_table(part)
    cx = t.column("cx_px").to_numpy().copy()
    cx[1] += 3.0
    t = t.set_column(t.schema.get_field_index("cx_px"), "cx_px", pa.array(cx))
    pq.write_table(t, part)
    assert "test-0000001" in problems(copy) and "re-render" in problems(copy)


@pytest.mark.parametrize("store", ["files", "none"])
@pytest.mark.parametrize("column,value", [("y", 16.0), ("hue", 0.0), ("class_name", "P3-99"), ("instance", 3)])
def test_a_row_edited_where_the_render_does_not_look_is_named(made, tmp_path, store, column, value):
    """An axis value in the spec's units (or the class, or the instance) changed after
    generation: the image still re-renders from the rendered values, but the row is no longer
    what the spec draws for its index (measured before: verify passed such a row; audit then
    found it in the other split's region)."""
    dst = tmp_path / "ds"
    shutil.copytree(made[store], dst)
    part = lay.part_path(dst, lay.MANIFEST_DIR, "train", 1)
    t = pq.read_table(part)
    values = t.column(column).to_pylist()
    values[2] = value
    k = t.schema.get_field_index(column)
    pq.write_table(t.set_column(k, t.schema.field(k), pa.array(values, t.schema.field(k).type)), part)
    assert verify(made[store]).ok
    assert f"split train: 1 rows whose parameters are not what the spec draws for their index, e.g. " \
           f"train-0000007 ({column})" in problems(dst)


@pytest.mark.parametrize("key,value,says", [("images", 99, "dataset.json says images 99; expected 18"),
                                             ("complete", False, "dataset.json says complete False; expected True"),
                                             ("classes", ["a"], "dataset.json says classes ['a']")])
def test_an_edited_summary_is_named(copy, key, value, says):
    """dataset.json is what people and tools read for a folder's counts (measured before:
    verify passed a summary claiming 99 images, or complete false)."""
    import json

    doc = json.loads((copy / lay.SUMMARY_FILE).read_text())
    doc[key] = value
    (copy / lay.SUMMARY_FILE).write_text(json.dumps(doc))
    assert says in problems(copy)


def test_a_dataset_without_its_summary_is_incomplete(copy):
    (copy / lay.SUMMARY_FILE).unlink()
    with pytest.raises(DatasetError, match="incomplete.*--resume"):
        verify(copy)
    rep = verify(copy, allow_incomplete=True)  # asked for explicitly: what is there is checked
    assert rep.problems == ["dataset.json is missing: generation did not finish (rerun generate --resume, or --finalize)"]


def test_stored_parquet_images_are_checked_too(made, tmp_path):
    dst = tmp_path / "pq"
    shutil.copytree(made["parquet"], dst)
    part = lay.part_path(dst, lay.MANIFEST_DIR, "train", 0)
    t = pq.read_table(part)
    blobs = t.column("image_bytes").to_pylist()
    img = cv2.imdecode(np.frombuffer(blobs[0], np.uint8), cv2.IMREAD_COLOR)
    img[5, 5] = 0
    blobs[0] = cv2.imencode(".png", img)[1].tobytes()
    t = t.set_column(t.schema.get_field_index("image_bytes"), "image_bytes", pa.array(blobs, pa.binary()))
    pq.write_table(t, part)
    assert "do not match their checksum" in problems(dst) and "train-0000000" in problems(dst)
