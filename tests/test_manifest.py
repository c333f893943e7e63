"""The manifest: one schema, readable without augsplit by pandas, pyarrow.dataset and duckdb."""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pandas as pd
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
from specs import spec_dict

from augsplit import manifest as mf
from augsplit.build import open_mapping
from augsplit.dataset import layout as lay
from augsplit.dataset import read_manifest
from augsplit.generate import Options, generate


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    out = tmp_path_factory.mktemp("mf") / "data"
    built = open_mapping(spec_dict(
        viewing={"distance_cm": 57, "px_per_cm": 10},
        axes={"x": {"range": [-2, 2], "unit": "deg"}, "y": {"range": [-2, 2], "unit": "deg"},
              "scale": {"range": [0.8, 1.2]}, "hue": {"range": [0, 360]}},
        canvas={"width": 64, "height": 64, "mode": "rgb"},
        render={"distractors": {"count": [0, 2]}},
        splits={"train": {"region": {"x": [-2, -0.5]}, "per_class": 9},
                "test": {"region": {"x": [0.5, 2]}, "per_class": 4}}))
    generate(None, out, Options(progress=False, shard_size=7), built=built)
    return out, built


def test_every_file_conforms_to_the_declared_schema(dataset):
    out, built = dataset
    for f in lay.part_files(out):
        schema = pq.read_schema(f)
        assert schema.remove_metadata().equals(mf.IMAGE_SCHEMA.remove_metadata())
        md = schema.metadata
        assert md[mf.META_HASH].decode() == built.plan.hash
        assert json.loads(md[mf.META_SPEC])["seed"] == built.spec.seed
        assert "pyarrow" in json.loads(md[mf.META_VERSIONS])
    for f in lay.part_files(out, lay.DISTRACTOR_DIR):
        assert pq.read_schema(f).remove_metadata().equals(mf.DISTRACTOR_SCHEMA.remove_metadata())


def test_pandas_pyarrow_and_duckdb_read_the_same_rows(dataset):
    # three independent Parquet readers (pandas docs, Arrow docs, DuckDB docs: hive partitioning)
    out, _ = dataset
    ours = read_manifest(out).sort_values("image_id").reset_index(drop=True)
    cols = ["image_id", "split", "class_name", "x", "y", "scale", "hue", "cx_px", "x_deg", "sha256"]
    by_pandas = pd.read_parquet(out / "manifest")
    by_pandas["split"] = by_pandas["split"].astype(str)
    by_pandas = by_pandas.sort_values("image_id").reset_index(drop=True)
    by_arrow = ds.dataset(out / "manifest", partitioning="hive").to_table().to_pandas()
    by_arrow["split"] = by_arrow["split"].astype(str)
    by_arrow = by_arrow.sort_values("image_id").reset_index(drop=True)
    glob = str(out / "manifest" / "*" / "*.parquet")
    by_duck = duckdb.sql(f"select {', '.join(cols)} from read_parquet('{glob}', hive_partitioning=true) "
                         f"order by image_id").df()
    for other in (by_pandas, by_arrow, by_duck):
        pd.testing.assert_frame_equal(ours[cols], other[cols], check_dtype=False)
    assert len(ours) == 9 * 2 + 4 * 2


def test_positions_in_every_unit_agree(dataset):
    # deg columns are the exact visual angle of the px position (atan(offset / D)); the spec's
    # x is in deg, so x == x_deg; a hand computation from the viewing geometry (from memory)
    out, _ = dataset
    m = read_manifest(out)
    d = 57 * 10
    assert np.allclose(m["x"], m["x_deg"])
    assert np.allclose(np.degrees(np.arctan((m["cx_px"] - 32) / d)), m["x_deg"])
    assert np.allclose(m["size_deg"], np.degrees(2 * np.arctan(m["size_px"] / (2 * d))))


def test_distractor_rows_match_their_scenes(dataset):
    out, _ = dataset
    m = read_manifest(out)
    dist = read_manifest(out, lay.DISTRACTOR_DIR)
    per = dist.groupby("image_id").size()
    got = m.set_index("image_id")["n_distractors"]
    assert (per.reindex(got.index, fill_value=0) == got).all()
    assert got.max() >= 1


def test_one_row_group_per_shard(dataset):
    out, _ = dataset
    for f in lay.part_files(out):
        meta = pq.ParquetFile(f).metadata
        assert meta.num_row_groups == 1 and meta.num_rows <= 7


def test_pixel_sha256_is_the_sha256_of_the_pixel_bytes_in_c_order():
    """Whatever the layout (views, channel-reversed, transposed, empty), the hash is that of
    the C-order bytes (hashlib, the reference)."""
    import hashlib

    base = np.arange(7 * 5 * 3, dtype=np.uint8).reshape(7, 5, 3)
    for a in (base, base[:, ::2], base[..., ::-1], base.transpose(1, 0, 2), np.asfortranarray(base),
              np.zeros((0, 5, 3), np.uint8), np.zeros((4, 4, 1), np.uint8)):
        assert mf.pixel_sha256(a) == hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest()


def test_row_positions_name_the_part_and_row_that_hold_each_row(dataset):
    """read_rows(positions=True): `_part` indexes folder.parts_of() and `_offset` is the row in
    that part; checked against each part read on its own with pyarrow.parquet (several parts
    per split, shard size 7)."""
    from augsplit.dataset import open_dataset
    from augsplit.dataset.rows import OFFSET_COLUMN, PART_COLUMN, read_rows

    out, _ = dataset
    folder = open_dataset(out)
    parts = folder.parts_of()
    assert len(parts) > 2
    ids = [pq.read_table(p.path, columns=["image_id"]).column("image_id").to_pylist() for p in parts]
    df = read_rows(folder, positions=True)
    assert len(df) == sum(map(len, ids))
    for image_id, k, offset in zip(df["image_id"], df[PART_COLUMN], df[OFFSET_COLUMN]):
        assert ids[k][offset] == image_id
