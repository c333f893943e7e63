"""The PNG deflate options (`--png-deflate`, `--png-level`; Options.png_deflate, png_level):
every library and level stores the same pixels (PNG is lossless: decoded images equal the
manifest's pixel checksums and each other), the stored bytes and their recorded checksums follow
the setting, verify checks them; the default follows the background kind; the setting is
recorded in the dataset's layout and a resumed run must use it; a folder made before the library
was an option counts as zlib's. Reference for "lossless": the PNG specification (W3C, 2003),
section 1; pixel equality by numpy.array_equal."""

from __future__ import annotations

import hashlib
import json
from typing import get_args

import numpy as np
import pytest

from augsplit.build import open_mapping
from augsplit.cli import main
from augsplit.dataset import open_dataset, read_manifest
from augsplit.dataset.images import decode, encode, stored_bytes
from augsplit.dataset.png import NOISE_BACKGROUNDS, default_deflate
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from augsplit.manifest import pixel_sha256
from augsplit.spec import BackgroundSpec
from augsplit.verify import verify

SPEC = {
    "seed": 5, "canvas": {"width": 40, "height": 32, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
    "background": {"kind": "pink_noise", "mean": 0.5, "contrast": 0.2},
    "axes": {"x": {"range": [6, 34]}, "y": {"range": [6, 26]}, "angle": {"range": [0, 360]}},
    "render": {"distractors": {"count": [0, 2]}},
    "splits": {"train": {"region": {"x": [6, 16]}, "count": 12}, "test": {"region": {"x": [22, 34]}, "count": 6}},
}
SOLID = dict(SPEC, background={"kind": "solid", "value": 0.4})
SETTINGS = [("zlib", 0), ("zlib", 1), ("zlib", 9), ("isal", 0), ("isal", 1), ("isal", 2)]


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    root = tmp_path_factory.mktemp("png")
    out = {}
    for store in ("files", "parquet"):
        for deflate, level in SETTINGS:
            d = root / f"{store}-{deflate}-{level}"
            generate(None, d, Options(store=store, png_deflate=deflate, png_level=level, shard_size=5, progress=False),
                     built=open_mapping(SPEC))
            out[store, deflate, level] = d
    return out


def _stored(d):
    ds = open_dataset(d)
    m = read_manifest(d).sort_values(["split", "index"]).reset_index(drop=True)
    return m, [stored_bytes(ds, row) for row in m.to_dict("records")]


@pytest.mark.parametrize("store", ["files", "parquet"])
def test_every_setting_stores_the_same_pixels_in_other_bytes(made, store):
    images, blobs = {}, {}
    for deflate, level in SETTINGS:
        d = made[store, deflate, level]
        assert verify(d).ok  # reads every stored image and checks its recorded checksums
        layout = open_dataset(d).layout
        assert (layout["png_deflate"], layout["png_level"]) == (deflate, level)
        m, data = _stored(d)
        assert list(m["file_sha256"]) == [hashlib.sha256(b).hexdigest() for b in data]
        images[deflate, level] = [decode(b, 3) for b in data]
        assert [pixel_sha256(im) for im in images[deflate, level]] == list(m["sha256"])
        # each file is exactly what the writer makes of those pixels with that setting
        assert data == [encode(im, "png", 95, level, deflate) for im in images[deflate, level]]
        blobs[deflate, level] = sum(map(len, data))
    first = images[SETTINGS[0]]
    for setting in SETTINGS[1:]:
        assert all(np.array_equal(a, b) for a, b in zip(first, images[setting]))
    # zlib's level 0 stores raw (deflate's stored blocks); its other levels and ISA-L's 1 and 2
    # compress this noise (ISA-L's level 0 need not: on noise it can exceed raw)
    assert blobs["zlib", 9] < blobs["zlib", 1] < blobs["zlib", 0]
    assert blobs["isal", 1] < blobs["zlib", 0] and blobs["isal", 2] < blobs["zlib", 0]


def test_the_default_follows_the_background_and_is_recorded(tmp_path):
    assert Options().png_deflate is None and Options().png_level is None
    # every background kind a spec can name: zlib on noise, ISA-L elsewhere
    kinds = [get_args(m.model_fields["kind"].annotation)[0] for m in get_args(get_args(BackgroundSpec)[0])]
    assert sorted(kinds) == sorted(NOISE_BACKGROUNDS + ("solid", "folder"))
    assert {k: default_deflate(k) for k in kinds} == {k: "zlib" if "noise" in k else "isal" for k in kinds}
    for spec, want in ((SPEC, ("zlib", 1)), (SOLID, ("isal", 2))):
        d = tmp_path / spec["background"]["kind"]
        generate(None, d, Options(store="parquet", shard_size=5, progress=False), built=open_mapping(spec))
        layout = open_dataset(d).layout
        assert (layout["png_deflate"], layout["png_level"]) == want
        m, data = _stored(d)
        assert data == [encode(decode(b, 3), "png", 95, want[1], want[0]) for b in data]
    d = tmp_path / "given"
    generate(None, d, Options(store="parquet", png_deflate="isal", shard_size=5, progress=False), built=open_mapping(SPEC))
    assert open_dataset(d).layout["png_level"] == 2  # the given library's default level


def test_a_resumed_run_must_use_the_recorded_setting(tmp_path):
    d = tmp_path / "ds"
    generate(None, d, Options(store="files", png_deflate="zlib", png_level=9, shard_size=5, progress=False,
                              array_shard=(0, 2)), built=open_mapping(SPEC))
    with pytest.raises(DatasetError, match="--png-deflate zlib --png-level 9"):
        generate(None, d, Options(store="files", png_deflate="isal", shard_size=5, progress=False, resume=True),
                 built=open_mapping(SPEC))
    with pytest.raises(DatasetError, match="rerun with --png-level 9"):
        generate(None, d, Options(store="files", shard_size=5, progress=False, resume=True), built=open_mapping(SPEC))
    generate(None, d, Options(store="files", png_level=9, shard_size=5, progress=False, resume=True),
             built=open_mapping(SPEC))
    assert verify(d).ok


@pytest.mark.parametrize("spec", [SPEC, SOLID], ids=["noise", "solid"])
def test_a_folder_from_before_the_option_resumes_as_zlib(tmp_path, spec):
    """A folder whose layout predates `png_deflate` was deflated by zlib (level 1 by default).
    On a noise background that is still the default, so it resumes as it is; on a solid one,
    resuming with the new default is refused in one line naming the options to use. With them
    it finishes, every file in zlib's bytes, and verifies."""
    d = tmp_path / "old"
    generate(None, d, Options(store="files", png_deflate="zlib", png_level=1, shard_size=5, progress=False,
                              array_shard=(0, 2)), built=open_mapping(spec))
    doc = json.loads((d / "spec.json").read_text())
    del doc["layout"]["png_deflate"]  # as a run before this option wrote it
    (d / "spec.json").write_text(json.dumps(doc))
    given = {}
    if spec is SOLID:
        with pytest.raises(DatasetError, match="rerun with --png-deflate zlib --png-level 1"):
            generate(None, d, Options(store="files", shard_size=5, progress=False, resume=True),
                     built=open_mapping(spec))
        given = {"png_deflate": "zlib", "png_level": 1}
    generate(None, d, Options(store="files", shard_size=5, progress=False, resume=True, **given),
             built=open_mapping(spec))
    assert verify(d).ok
    m, data = _stored(d)
    assert len(data) == 18 and data == [encode(decode(b, 3), "png", 95, 1, "zlib") for b in data]


@pytest.mark.parametrize("args,needle", [
    # the demo's background is solid: ISA-L by default
    (["--png-level", "3"], "PNG level must be an integer in 0..2 for isal (the default for a solid background; "
                           "--png-deflate zlib takes others), got 3"),
    (["--png-deflate", "isal", "--png-level", "3"], "PNG level must be an integer in 0..2 for isal, got 3"),
    (["--png-deflate", "zlib", "--png-level", "10"], "PNG level must be an integer in 0..9 for zlib, got 10"),
    (["--png-level", "10"], "PNG level must be an integer in 0..9 for isal or zlib, got 10"),
    (["--png-level", "-1"], "PNG level must be an integer in 0..9 for isal or zlib, got -1"),
])
def test_a_level_outside_the_librarys_range_is_one_line(tmp_path, capsys, args, needle):
    out = tmp_path / "ds"
    assert main(["generate", "demo", "--out", str(out), "--quiet", *args]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and needle in err and "--png-level" in err
    assert not out.exists()  # refused before anything is written


def test_an_unknown_library_is_one_line(tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["generate", "demo", "--out", str(tmp_path / "ds"), "--png-deflate", "lz4"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--png-deflate" in err and "isal" in err and "zlib" in err
    with pytest.raises(DatasetError, match="unknown PNG deflate library 'lz4'; use one of isal, zlib"):
        generate(None, tmp_path / "api", Options(png_deflate="lz4"), built=open_mapping(SPEC))
