"""The audit of a dataset folder on several workers: local processes and a dask LocalCluster
give the single-process result, check by check; every split is hashed once per run however
many pairs name it; bad executor options are one line and exit 2; the workers run with one
OpenCV thread and the caller's setting is restored."""

from __future__ import annotations

import json
import shutil

import cv2
import numpy as np
import pytest

from augsplit.audit import phash
from augsplit.audit.entry import audit_dataset
from augsplit.audit.report import to_json
from augsplit.cli import main
from augsplit.dataset import read_manifest
from augsplit.generate import Options, generate
from augsplit.build import open_mapping

SPEC = dict(
    seed=11,
    canvas={"width": 56, "height": 40, "mode": "rgb"},
    objects={"kind": "polyomino", "cells": 4, "cell_px": 3, "colour": [200, 60, 30]},
    background={"kind": "uniform_noise", "lo": 0.2, "hi": 0.6},
    axes={"x": {"range": [8, 48]}, "y": {"range": [8, 32]}, "angle": {"range": [0, 360]}},
    splits={"train": {"region": {"x": [8, 16]}, "count": 40},
            "test": {"region": {"x": [34, 48]}, "count": 16},
            "iid": {"region": {"x": [8, 16]}, "count": 16}},
    guarantees=[{"disjoint": "footprint", "between": ["train", "test"]}],
)


@pytest.fixture(scope="module")
def leaky(tmp_path_factory):
    """Small parts (many tasks), a train image copied over a test image and over an iid image,
    and an unreadable test image."""
    out = tmp_path_factory.mktemp("workers") / "ds"
    generate(None, out, Options(progress=False, shard_size=6), built=open_mapping(SPEC))
    m = read_manifest(out)
    train, test, iid = (m[m["split"] == s] for s in ("train", "test", "iid"))
    shutil.copyfile(out / train.iloc[2]["file"], out / test.iloc[5]["file"])
    shutil.copyfile(out / train.iloc[7]["file"], out / iid.iloc[1]["file"])
    (out / test.iloc[9]["file"]).write_bytes(b"not an image")
    return out


def _same(a, b) -> None:
    """Two AuditResults are the same: the report (verdict, every check's numbers and worst
    rows, what was skipped) and every array a check carries."""
    assert json.dumps(to_json(a), sort_keys=True, default=str) == json.dumps(to_json(b), sort_keys=True, default=str)
    for x, y in zip(a.checks, b.checks):
        assert x.name == y.name and x.pair == y.pair and x.arrays.keys() == y.arrays.keys()
        for k in x.arrays:
            if isinstance(x.arrays[k], np.ndarray):
                assert np.array_equal(x.arrays[k], y.arrays[k]), (x.name, k)


@pytest.fixture(scope="module")
def single(leaky):
    res = audit_dataset(leaky, executor="serial")
    failed = {c.name for c in res.failed()}
    assert {"near_duplicates", "image_files"} <= failed  # the planted leaks are found
    return res


def test_two_processes_give_the_single_process_result(leaky, single):
    _same(audit_dataset(leaky, workers=2, executor="processes"), single)


def test_dask_gives_the_single_process_result(leaky, single):
    pytest.importorskip("distributed")
    _same(audit_dataset(leaky, workers=2, executor="dask"), single)


def test_every_split_is_hashed_once_per_run(leaky, monkeypatch):
    hashed = []
    real = phash.content_hash  # called once per image hashed

    def counting(image):
        hashed.append(1)
        return real(image)

    monkeypatch.setattr(phash, "content_hash", counting)
    audit_dataset(leaky, pairs=[("train", "test"), ("train", "iid"), ("test", "iid")])
    assert len(hashed) == 40 + 16 + 16  # train, test and iid, each once, though each is in two pairs


def test_cli_executor_options(leaky, tmp_path, capsys):
    assert main(["audit", str(leaky), "--workers", "2", "--quiet", "--out", str(tmp_path / "rep")]) == 1
    assert json.loads((tmp_path / "rep" / "audit.json").read_text())["verdict"] == "fail"
    capsys.readouterr()
    assert main(["audit", str(leaky), "--workers", "0", "--quiet", "--out", str(tmp_path / "bad")]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "--workers" in err
    assert not (tmp_path / "bad").exists()


def test_cli_workers_not_a_number_is_one_line(leaky, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["audit", str(leaky), "--workers", "abc"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "--workers" in err and "invalid int value: 'abc'" in err


def test_cli_dead_scheduler_is_one_line(leaky, tmp_path, capsys):
    pytest.importorskip("distributed")
    code = main(["audit", str(leaky), "--scheduler", "tcp://127.0.0.1:9", "--quiet", "--out", str(tmp_path / "rep")])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and "scheduler" in err
    assert not (tmp_path / "rep").exists() and not (leaky / "audit").exists()


def test_executor_options_are_refused_for_a_table(leaky, tmp_path, capsys):
    """Only a dataset folder's image work runs on workers: elsewhere the options are refused, not ignored."""
    table = tmp_path / "rows.parquet"
    read_manifest(leaky).drop(columns=["image_bytes"]).to_parquet(table)
    code = main(["audit", str(table), "--axis", "x=8:48", "--workers", "2", "--quiet", "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err
    assert code == 2 and "--workers" in err and len(err.strip().splitlines()) == 1


_REAL: dict = {}  # the task before the test wraps it (forked workers inherit this)


def _threads_task(root, masks, job):
    """The chunk task, reporting the OpenCV thread count it ran with."""
    res = _REAL["chunk_task"](root, masks, job)
    res.unmade[-1] = str(cv2.getNumThreads())
    return res


@pytest.mark.parametrize("executor", ["serial", "processes"])
def test_workers_run_one_opencv_thread_and_the_caller_keeps_its_own(leaky, monkeypatch, executor):
    from augsplit.audit import parallel

    _REAL["chunk_task"] = parallel.chunk_task
    seen = []
    real_place = parallel.RowCache._place

    def place(self, rows, res):
        seen.append(res.unmade.pop(-1))
        return real_place(self, rows, res)

    monkeypatch.setattr(parallel, "chunk_task", _threads_task)
    monkeypatch.setattr(parallel.RowCache, "_place", place)
    before = cv2.getNumThreads()
    cv2.setNumThreads(3)
    try:
        audit_dataset(leaky, workers=2, executor=executor)
        assert cv2.getNumThreads() == 3  # restored
    finally:
        cv2.setNumThreads(before)
    assert seen and set(seen) == {"1"}
