"""One policy for opening a dataset folder, whoever opens it: every command and loader works on a
complete folder, and refuses an unfinished one (no dataset.json) naming `--resume`, or a mixed
one (a part of another spec, a part no shard makes) naming the part, in one line with exit 2,
changing nothing. Parts that do not match the declared schema are refused the same way."""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

from augsplit.cli import main
from augsplit.data import Dataset, OnlineSampler
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from specs import snapshot

SPEC = {
    "seed": 41,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [40, 90, 220]},
    "background": {"kind": "gaussian_noise", "mean": 0.5, "sd": 0.2},
    "axes": {"x": {"range": [5, 19]}, "y": {"range": [5, 19]}, "angle": {"range": [0, 360]}},
    "splits": {"train": {"region": {"x": [5, 10]}, "count": 12}, "test": {"region": {"x": [14, 19]}, "count": 6}},
    "guarantees": [{"disjoint": "parameters", "between": ["train", "test"], "margin": 0.05}],
}
SERIAL = Options(shard_size=5, progress=False)  # the reference run (conftest.serial): train 3 parts, test 2


def part(root: Path, split: str, shard: int) -> Path:
    # spelled out (not through augsplit) so the test states the layout it expects
    return root / "manifest" / f"split={split}" / f"part-{shard:06d}.parquet"


@pytest.fixture(scope="module")
def other(tmp_path_factory) -> Path:
    """The same spec with another seed: its parts carry another spec hash."""
    root = tmp_path_factory.mktemp("other")
    spec = root / "spec.yaml"
    spec.write_text(yaml.safe_dump(dict(SPEC, seed=42), sort_keys=False))
    generate(spec, root / "ds", SERIAL)
    return root / "ds"


def variant(kind: str, serial: Path, other: Path, dst: Path) -> tuple[Path, str]:
    """A copy of the reference dataset made complete, unfinished or mixed; and the text the
    refusal must name."""
    shutil.copytree(serial, dst)
    if kind == "incomplete":
        (dst / "dataset.json").unlink()
        return dst, "--resume"
    if kind == "mixed_spec":
        shutil.copyfile(part(other, "test", 1), part(dst, "test", 1))
        return dst, str(part(dst, "test", 1))
    if kind == "mixed_shards":
        shutil.copyfile(part(dst, "test", 0), part(dst, "test", 7))
        return dst, str(part(dst, "test", 7))
    if kind == "mixed_size":  # a part of shard size 4 among parts of shard size 5 (same spec)
        t = pq.read_table(part(dst, "train", 0))
        pq.write_table(t.slice(0, 4), part(dst, "train", 0))
        return dst, str(part(dst, "train", 0))
    return dst, ""


def predictions(root: Path, path: Path) -> Path:
    m = pd.read_parquet(root / "manifest", columns=["image_id", "class_name"])
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]}).to_csv(path, index=False)
    return path


KINDS = ["complete", "incomplete", "mixed_spec", "mixed_shards", "mixed_size"]
COMMANDS = {
    "verify": lambda d, t: ["verify", d],
    "preview": lambda d, t: ["preview", d, "--out", t / "pics", "--per-split", "2"],
    "audit": lambda d, t: ["audit", d, "--out", t / "audit", "--quiet"],
    "score": lambda d, t: ["score", d, predictions(d, t / "pred.csv"), "--out", t / "score"],
}


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_every_command_on_every_kind_of_folder(command, kind, serial, other, tmp_path, capsys):
    root, named = variant(kind, serial, other, tmp_path / "ds")
    args = COMMANDS[command](root, tmp_path)
    before = snapshot(root)
    code = main([str(a) for a in args])
    err = capsys.readouterr().err
    if kind == "complete":
        assert code == 0, err
        return
    assert code == 2, err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert named in err
    assert snapshot(root) == before  # a refusal writes nothing


@pytest.mark.parametrize("kind", KINDS)
def test_the_loaders_follow_the_same_policy(kind, serial, other, tmp_path):
    root, named = variant(kind, serial, other, tmp_path / "ds")
    if kind == "complete":
        assert Dataset(root, "test")[0]["image"].shape == (24, 24, 3)
        assert OnlineSampler(root, "test", length=1)[0]["image"].shape == (24, 24, 3)
        return
    for opener in (lambda: Dataset(root, "test"), lambda: OnlineSampler(root, "test", length=1)):
        with pytest.raises(DatasetError) as e:
            opener()
        assert named in str(e.value) and "\n" not in str(e.value)


@pytest.mark.parametrize("command", ["verify", "preview"])
def test_an_unfinished_folder_is_opened_when_asked_for(command, serial, tmp_path, capsys):
    root = tmp_path / "ds"
    shutil.copytree(serial, root)
    (root / "dataset.json").unlink()
    args = [command, str(root), "--allow-incomplete"] + (["--out", str(tmp_path / "pics")] if command == "preview" else [])
    code = main(args)
    out = capsys.readouterr().out
    if command == "verify":
        assert code == 1 and "dataset.json is missing" in out  # a finding, not a refusal
    else:
        assert code == 0 and len(out.split()) == 3  # two contact sheets and the coverage map


# ---- parts that are not what the schema declares ------------------------------------------------


def _rewrite(path: Path, change) -> None:
    t = pq.read_table(path)
    pq.write_table(change(t).replace_schema_metadata(t.schema.metadata), path)


def _truncate(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _drop_index(path: Path) -> None:
    _rewrite(path, lambda t: t.drop_columns(["index"]))


def _index_as_strings(path: Path) -> None:
    def change(t):
        i = t.schema.get_field_index("index")
        return t.set_column(i, "index", pa.array([str(v) for v in t.column("index").to_pylist()]))

    _rewrite(path, change)


@pytest.mark.parametrize("damage", [_truncate, _drop_index, _index_as_strings])
@pytest.mark.parametrize("command", ["verify", "preview", "audit", "score"])
def test_a_damaged_part_is_one_line_naming_the_file(damage, command, serial, tmp_path, capsys):
    root = tmp_path / "ds"
    shutil.copytree(serial, root)
    args = COMMANDS[command](root, tmp_path)  # predictions are read before the damage
    victim = part(root, "train", 1)
    damage(victim)
    code = main([str(a) for a in args])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err, err
    assert str(victim) in err


def test_the_declared_schema_is_named(serial, tmp_path):
    from augsplit.dataset import open_dataset

    root = tmp_path / "ds"
    shutil.copytree(serial, root)
    _index_as_strings(part(root, "train", 0))
    with pytest.raises(DatasetError, match="column 'index' is string, declared int64"):
        open_dataset(root)
    _drop_index(part(root, "train", 0))
    with pytest.raises(DatasetError, match="no column 'index'"):
        open_dataset(root)


@pytest.mark.parametrize("sample", ["-1", "-5"])
def test_a_negative_sample_is_one_line(sample, serial, capsys):
    code = main(["verify", str(serial), "--sample", sample])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "--sample" in err


def test_rows_come_in_spec_order_with_the_declared_types(serial):
    from augsplit.dataset import iter_batches, open_dataset, read_rows

    folder = open_dataset(serial)
    df = read_rows(folder)
    assert list(pd.unique(df["split"])) == ["train", "test"]  # spec order, not alphabetical
    for name, g in df.groupby("split"):
        assert list(g["index"]) == list(range(len(g)))
    assert str(df["index"].dtype) == "int64" and df["split"].map(type).eq(str).all()
    # streaming gives the same rows, a bounded batch at a time
    batches = list(iter_batches(folder, columns=["image_id", "split"], batch_rows=3))
    assert max(len(b) for b in batches) <= 3
    streamed = pd.concat(batches, ignore_index=True)
    assert sorted(streamed["image_id"]) == sorted(df["image_id"])
    # the reader a user can check against: pyarrow's own hive reading of the same folder
    theirs = pd.read_parquet(serial / "manifest", columns=["image_id", "cx_px"])
    ours = df.set_index("image_id")["cx_px"]
    assert (theirs.set_index("image_id")["cx_px"].sort_index() == ours.sort_index()).all()
