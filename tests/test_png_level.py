"""The PNG level option (`--png-level`, Options.png_level): every level stores the same pixels
(PNG is lossless: decoded images equal the manifest's pixel checksums and each other), the
stored bytes and their recorded checksums follow the level, verify checks them, the level is
recorded in the dataset's layout and a resumed run must use it. Reference for "lossless": the
PNG specification (W3C, 2003), section 1; pixel equality by numpy.array_equal."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

from augsplit.build import open_mapping
from augsplit.dataset import open_dataset, read_manifest
from augsplit.dataset.images import decode, encode
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from augsplit.manifest import pixel_sha256
from augsplit.verify import verify

SPEC = {
    "seed": 5, "canvas": {"width": 40, "height": 32, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
    "background": {"kind": "pink_noise", "mean": 0.5, "contrast": 0.2},
    "axes": {"x": {"range": [6, 34]}, "y": {"range": [6, 26]}, "angle": {"range": [0, 360]}},
    "render": {"distractors": {"count": [0, 2]}},
    "splits": {"train": {"region": {"x": [6, 16]}, "count": 12}, "test": {"region": {"x": [22, 34]}, "count": 6}},
}


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    root = tmp_path_factory.mktemp("png")
    out = {}
    for store in ("files", "parquet"):
        for level in (0, 1, 9):
            d = root / f"{store}-{level}"
            generate(None, d, Options(store=store, png_level=level, shard_size=5, progress=False),
                     built=open_mapping(SPEC))
            out[store, level] = d
    return out


def _stored(d):
    ds = open_dataset(d)
    m = read_manifest(d).sort_values(["split", "index"]).reset_index(drop=True)
    from augsplit.dataset.images import stored_bytes

    return m, [stored_bytes(ds, row) for row in m.to_dict("records")]


@pytest.mark.parametrize("store", ["files", "parquet"])
def test_every_level_stores_the_same_pixels_in_other_bytes(made, store):
    images, blobs = {}, {}
    for level in (0, 1, 9):
        d = made[store, level]
        assert verify(d).ok  # reads every stored image and checks its recorded checksums
        assert open_dataset(d).layout["png_level"] == level
        m, data = _stored(d)
        assert list(m["file_sha256"]) == [hashlib.sha256(b).hexdigest() for b in data]
        images[level] = [decode(b, 3) for b in data]
        assert [pixel_sha256(im) for im in images[level]] == list(m["sha256"])
        blobs[level] = data
    for level in (1, 9):
        assert all(np.array_equal(a, b) for a, b in zip(images[0], images[level]))
    # the levels differ in what they store: level 0 is raw (deflate's stored blocks), the
    # others compress this noise
    assert sum(map(len, blobs[9])) < sum(map(len, blobs[1])) < sum(map(len, blobs[0]))


def test_the_default_level_is_what_encode_uses_without_one():
    im = np.random.default_rng(0).integers(0, 256, (16, 16, 3), dtype=np.uint8)
    assert encode(im, "png", 95) == encode(im, "png", 95, Options().png_level)
    assert encode(im, "png", 95, 0) != encode(im, "png", 95, 9)


def test_a_resumed_run_must_use_the_recorded_level(made, tmp_path):
    d = tmp_path / "ds"
    generate(None, d, Options(store="files", png_level=9, shard_size=5, progress=False, array_shard=(0, 2)),
             built=open_mapping(SPEC))
    with pytest.raises(DatasetError, match="--png-level 9"):
        generate(None, d, Options(store="files", png_level=1, shard_size=5, progress=False, resume=True),
                 built=open_mapping(SPEC))
