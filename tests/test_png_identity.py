"""Byte identity with ISA-L, the deflate library of flat backgrounds (dataset/png.py): the
dataset of a solid-background spec is the same, file for file, whatever the executor, the
number of workers or the job-array split, for image files and for tar shards. (The other
identity tests use noise backgrounds, whose PNGs zlib deflates.)"""

from __future__ import annotations

import dataclasses

import pytest

from augsplit.dataset import open_dataset
from augsplit.generate import Options, finalize, generate
from augsplit.verify import verify
from specs import assert_same_tree

SPEC = {
    "seed": 3,
    "canvas": {"width": 32, "height": 32, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [200, 60, 40]},
    "background": {"kind": "solid", "value": 0.3},
    "axes": {"x": {"range": [6, 26]}, "y": {"range": [6, 26]}, "angle": {"range": [0, 360]},
             "hue": {"range": [0, 360]}},
    "render": {"distractors": {"count": [0, 1]}},
    "splits": {"train": {"region": {"x": [6, 14]}, "count": 24}, "test": {"region": {"x": [18, 26]}, "count": 12}},
}
SERIAL = Options(shard_size=5, progress=False)


def test_the_serial_run_is_isal_and_verifies(serial):
    layout = open_dataset(serial).layout
    assert (layout["png_deflate"], layout["png_level"]) == ("isal", 2)
    assert verify(serial).ok


def test_two_worker_processes_give_the_serial_bytes(spec_file, serial, tmp_path):
    generate(spec_file, tmp_path / "p", dataclasses.replace(SERIAL, workers=2, executor="processes"))
    assert_same_tree(serial, tmp_path / "p")


def test_job_array_shards_give_the_serial_bytes(spec_file, serial, tmp_path):
    out = tmp_path / "a"
    for k in range(3):
        generate(spec_file, out, dataclasses.replace(SERIAL, array_shard=(k, 3)))
    finalize(out)
    assert_same_tree(serial, out)


@pytest.mark.parametrize("workers", [1, 2])
def test_tar_shards_are_the_same_for_any_number_of_workers(spec_file, tmp_path, workers):
    one = tmp_path / "one"
    generate(spec_file, one, dataclasses.replace(SERIAL, store="tar"))
    other = tmp_path / f"w{workers}"
    generate(spec_file, other, dataclasses.replace(SERIAL, store="tar", workers=workers, executor="processes"))
    assert_same_tree(one, other)
    assert verify(other).ok


def test_a_dask_cluster_gives_the_serial_bytes(spec_file, serial, tmp_path):
    pytest.importorskip("distributed")
    out = tmp_path / "dask"
    generate(spec_file, out, dataclasses.replace(SERIAL, executor="dask", workers=2))
    assert_same_tree(serial, out)
