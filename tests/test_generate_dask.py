"""The dask executor on a real distributed.LocalCluster (two worker processes): the dataset is
byte-identical to the serial one, through a scheduler address or a cluster of its own, and a
worker killed mid-shard loses and duplicates nothing."""

from __future__ import annotations

import dataclasses
import os
import signal
from pathlib import Path

import pytest

from augsplit.dataset import layout as lay
from augsplit.dataset import read_manifest
from augsplit.generate import Options, generate
from augsplit.verify import verify
from specs import assert_same_tree

distributed = pytest.importorskip("distributed")

SPEC = {
    "seed": 5,
    "canvas": {"width": 32, "height": 32, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [40, 160, 220]},
    "background": {"kind": "uniform_noise", "lo": 0.2, "hi": 0.6},
    "axes": {"x": {"range": [6, 26]}, "y": {"range": [6, 26]}, "angle": {"range": [0, 360]},
             "hue": {"range": [0, 360]}},
    "render": {"distractors": {"count": [0, 1]}},
    "splits": {"train": {"region": {"y": [6, 14]}, "count": 40}, "test": {"region": {"y": [18, 26]}, "count": 16}},
}
SERIAL = QUICK = Options(shard_size=4, progress=False)


@pytest.fixture(scope="module")
def cluster():
    import logging

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                                  silence_logs=logging.CRITICAL) as c:
        yield c


def test_dask_through_a_scheduler_address_gives_the_serial_bytes(spec_file, serial, cluster, tmp_path):
    out = tmp_path / "dask"
    generate(spec_file, out, dataclasses.replace(QUICK, executor="dask", scheduler=cluster.scheduler_address))
    assert_same_tree(serial, out)
    assert verify(out).ok


def test_dask_with_its_own_local_cluster_gives_the_serial_bytes(spec_file, serial, tmp_path):
    out = tmp_path / "dask-local"
    generate(spec_file, out, dataclasses.replace(QUICK, executor="dask", workers=2))
    assert_same_tree(serial, out)


def _install_killer(marker: str, victim: tuple) -> None:
    """Runs inside each dask worker: the first worker to start the victim shard leaves a
    half-written temporary image behind and is killed, as a node lost mid-shard would be."""
    import augsplit.generate as g

    original = g.write_shard

    def write_shard(built, job, out, opts):
        if (job.split, job.shard) == victim and not os.path.exists(marker):
            open(marker, "w").close()
            img_dir = Path(out) / lay.IMAGES_DIR / job.split
            img_dir.mkdir(parents=True, exist_ok=True)
            (img_dir / f".{job.split}-{job.start:07d}.png.tmp-{os.getpid()}").write_bytes(b"\x89PNG half")
            os.kill(os.getpid(), signal.SIGKILL)
        return original(built, job, out, opts)

    g.write_shard = write_shard


def test_a_worker_killed_mid_shard_loses_and_duplicates_nothing(spec_file, serial, cluster, tmp_path):
    marker = tmp_path / "killed"
    with distributed.Client(cluster.scheduler_address, set_as_default=False) as client:
        pids_before = set(client.run(os.getpid).values())
        client.run(_install_killer, str(marker), ("train", 3))
        out = tmp_path / "dask-killed"
        generate(spec_file, out, dataclasses.replace(QUICK, executor="dask", scheduler=cluster.scheduler_address))
        client.wait_for_workers(2, timeout=60)
        pids_after = set(client.run(os.getpid).values())
    assert marker.exists() and pids_after != pids_before  # a worker really died and was replaced
    assert_same_tree(serial, out)  # its shard was redone; its temporary file swept at the end
    df = read_manifest(out)
    assert not df["image_id"].duplicated().any() and len(df) == 56


def _pretend_version(library: str, version: str | None) -> None:
    """Runs on a worker: report another version of `library` (None: the real ones again)."""
    import augsplit.manifest as m

    real = getattr(m, "_real_versions", m.versions)
    m._real_versions = real
    m.versions = real if version is None else (lambda: dict(real(), **{library: version}))


@pytest.mark.parametrize("library", ["numpy", "scipy", "isal", "zlib"])
def test_workers_with_other_library_versions_are_refused(spec_file, cluster, tmp_path, library):
    """Output bytes depend on numpy, OpenCV, pyarrow, scipy (the pink-noise FFT), isal and zlib
    (the PNG deflate libraries) and augsplit:
    a worker with another version would break byte identity silently, so the run stops before
    writing anything."""
    from augsplit.errors import DatasetError

    with distributed.Client(cluster.scheduler_address, set_as_default=False) as client:
        client.run(_pretend_version, library, "0.0-other")
        try:
            out = tmp_path / "never"
            with pytest.raises(DatasetError, match=f"{library} 0.0-other"):
                generate(spec_file, out, dataclasses.replace(QUICK, executor="dask", scheduler=cluster.scheduler_address))
            assert not out.exists()
        finally:
            client.run(_pretend_version, library, None)
