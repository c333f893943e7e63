"""The parameter log (augsplit.paramlog): buffering, part files, processes, reading back.

Outside references: pandas.read_parquet / pyarrow read the log folder as one table without
augsplit; multiprocessing (fork and spawn) for processes that share a log.
"""

from __future__ import annotations

import multiprocessing as mp
import pickle

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from augsplit import manifest as mf
from augsplit.build import open_mapping
from augsplit.errors import DatasetError
from augsplit.paramlog import COLUMNS, LOG_SCHEMA, ParamLog, current_worker, log_files, log_spec, read_log
from augsplit.spec import parse_spec, spec_hash

SPEC = {"seed": 1, "canvas": {"width": 32, "height": 32}, "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
        "axes": {"x": {"range": [0, 32]}, "angle": {"range": [0, 360]}},
        "splits": {"train": {"region": {"x": [0, 14]}, "count": 10}, "test": {"region": {"x": [18, 32]}, "count": 10}}}


@pytest.fixture(scope="module")
def plan():
    return open_mapping(SPEC).plan


def draw(i: int) -> dict:
    return {"x": 0.5 + i, "angle": float(i % 360), "class_name": "P3-00", "class_index": 0, "cell": 0,
            "not_a_column": "ignored"}


def test_rows_buffer_flush_and_read_back(plan, tmp_path):
    log = ParamLog(tmp_path, flush_every=4)
    for i in range(10):
        log.record(plan, "train", draw(i), epoch=i // 5, item=i % 5, source="test")
    assert len(log_files(tmp_path)) == 2  # two full buffers of 4 written, 2 rows still buffered
    log.close()
    assert len(log_files(tmp_path)) == 3
    df = read_log(tmp_path)
    assert len(df) == 10
    assert list(zip(df["epoch"], df["item"])) == [(i // 5, i % 5) for i in range(10)]
    np.testing.assert_array_equal(df["x"], [0.5 + i for i in range(10)])
    assert df["y"].isna().all() and df["hue"].isna().all()  # not given: null, not a made-up value
    assert set(df["split"]) == {"train"} and set(df["worker"]) == {-1} and set(df["spec_hash"]) == {plan.hash}
    # any Parquet reader sees the same table: pandas over the folder (pyarrow dataset)
    other = pd.read_parquet(tmp_path).sort_values(["epoch", "item"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(other[list(COLUMNS)], df[list(COLUMNS)], check_dtype=False)
    log.close()  # closing twice writes nothing more
    assert len(log_files(tmp_path)) == 3


def test_columns_share_the_manifest_schema():
    types = {c.name: c.type for c in mf.IMAGE_COLUMNS}
    for name in ("x", "y", "eccentricity", "polar_angle", "scale", "angle", "hue", "saturation", "brightness",
                 "mirror", "cx_px", "cy_px", "class_name", "class_index", "cell", "bbox_x0", "bbox_y0", "bbox_x1",
                 "bbox_y1"):
        assert LOG_SCHEMA.field(name).type == types[name]
    for name in ("split", "epoch", "item", "worker"):
        assert name in LOG_SCHEMA.names


def test_array_records(plan, tmp_path):
    log = ParamLog(tmp_path)
    log.record(plan, "train", {"x": np.arange(5.0), "angle": np.zeros(5), "class_index": np.zeros(5, int)},
               epoch=3, item=np.arange(10, 15), source="batch")
    log.close()
    df = read_log(tmp_path)
    assert list(df["item"]) == list(range(10, 15)) and set(df["epoch"]) == {3}
    np.testing.assert_array_equal(df["x"], np.arange(5.0))


def test_files_carry_the_spec(plan, tmp_path):
    log = ParamLog(tmp_path)
    log.record(plan, "train", draw(0), epoch=0, item=0, source="test")
    log.close()
    assert spec_hash(parse_spec(log_spec(tmp_path))) == plan.hash


def test_one_log_one_spec(plan, tmp_path):
    other = open_mapping({**SPEC, "seed": 2}).plan
    log = ParamLog(tmp_path)
    log.record(plan, "train", draw(0), epoch=0, item=0, source="test")
    with pytest.raises(DatasetError, match=f"already holds draws of spec {plan.hash}"):
        log.record(other, "train", draw(1), epoch=0, item=1, source="test")


def test_bad_input(plan, tmp_path, capsys):
    with pytest.raises(DatasetError, match="flush_every"):
        ParamLog(tmp_path, flush_every=0)
    (tmp_path / "file").write_text("not a folder")
    log = ParamLog(tmp_path / "file", flush_every=1)
    with pytest.raises(DatasetError, match="the parameter log folder is a file"):
        log.record(plan, "train", draw(0), epoch=0, item=0, source="test")
    log._flush_at_exit()  # at exit the same failure is one line on stderr, not a traceback
    assert "were not written" in capsys.readouterr().err
    log._reset()  # drop the rows, or the real exit hook reports them again
    with pytest.raises(DatasetError, match="no such parameter log folder"):
        read_log(tmp_path / "missing")


def test_temporary_and_foreign_files_are_not_read(plan, tmp_path):
    log = ParamLog(tmp_path)
    log.record(plan, "train", draw(0), epoch=0, item=0, source="test")
    log.close()
    (tmp_path / ".part-1-x-000000.parquet.tmp-1").write_bytes(b"half written")
    assert len(read_log(tmp_path)) == 1
    (tmp_path / "part-9-bad-000000.parquet").write_bytes(b"not parquet")
    with pytest.raises(DatasetError, match="unreadable parameter log part"):
        read_log(tmp_path)


def test_empty_log_reads_as_empty_table(tmp_path):
    df = read_log(tmp_path)
    assert len(df) == 0 and list(df.columns) == list(COLUMNS)


def _child(log, plan, n):
    for i in range(n):
        log.record(plan, "train", draw(100 + i), epoch=1, item=100 + i, source="child")
    # no close(): the exit hook must write the buffer


def test_forked_children_write_their_own_rows_once(plan, tmp_path):
    # Reference: multiprocessing's fork start method copies the parent's unflushed buffer into
    # the child; the child must neither write it again nor lose its own rows at exit.
    log = ParamLog(tmp_path, flush_every=1000)
    for i in range(3):
        log.record(plan, "train", draw(i), epoch=0, item=i, source="parent")
    ctx = mp.get_context("fork")
    procs = [ctx.Process(target=_child, args=(log, plan, 7)) for _ in range(2)]
    for p in procs:
        p.start()
    for p in procs:
        p.join()
        assert p.exitcode == 0
    log.close()
    df = read_log(tmp_path)
    assert (df["source"] == "parent").sum() == 3
    assert (df["source"] == "child").sum() == 14
    assert df.groupby("pid").size().to_dict().values().__len__() == 3  # one writer per process
    names = [f.name for f in log_files(tmp_path)]
    assert len(set(names)) == len(names) == 3


def test_spawned_children_get_an_empty_log(plan, tmp_path):
    log = ParamLog(tmp_path, flush_every=1000)
    log.record(plan, "train", draw(0), epoch=0, item=0, source="parent")
    clone = pickle.loads(pickle.dumps(log))
    assert clone._rows == 0 and clone.log_dir == log.log_dir and clone.flush_every == 1000
    ctx = mp.get_context("spawn")
    p = ctx.Process(target=_child, args=(log, plan, 4))
    p.start()
    p.join()
    assert p.exitcode == 0
    log.close()
    assert sorted(read_log(tmp_path)["source"].value_counts().items()) == [("child", 4), ("parent", 1)]


def test_outside_a_dataloader_worker_is_minus_one():
    assert current_worker() == -1


def test_part_files_are_single_row_group_parquet(plan, tmp_path):
    log = ParamLog(tmp_path, flush_every=50)
    for i in range(120):
        log.record(plan, "train", draw(i), epoch=0, item=i, source="test")
    log.close()
    files = log_files(tmp_path)
    assert [pq.ParquetFile(f).metadata.num_rows for f in files] == [50, 50, 20]
    assert all(pq.read_schema(f).equals(LOG_SCHEMA, check_metadata=False) for f in files)
    assert pq.read_table(files[0]).column("split").type == LOG_SCHEMA.field("split").type == pa.string()


def test_a_log_part_linked_out_of_the_folder_is_refused_not_read(plan, tmp_path):
    """The log folder is read only inside, its spec as its rows (measured before: the spec and
    rows of a part linked in from elsewhere were read)."""
    elsewhere = tmp_path / "elsewhere"
    log = ParamLog(elsewhere)
    log.record(plan, "train", draw(0), epoch=0, item=0, source="test")
    log.close()
    folder = tmp_path / "log"
    folder.mkdir()
    (folder / log_files(elsewhere)[0].name).symlink_to(log_files(elsewhere)[0])
    with pytest.raises(DatasetError, match="symbolic link out of the folder given; it was not read"):
        log_spec(folder)
    with pytest.raises(DatasetError, match="symbolic link out of the folder given; it was not read"):
        read_log(folder)
