"""A manifest row edited after generation (a class or instance the spec has not, a scale that is
not positive, a tar offset past the archive's end): every command that reads the row's image
says so in one line naming the row, with exit 2, and the loader raises a DatasetError
(measured before: IndexError, ValueError and OSError tracebacks, exit 1, from preview, export
and the Dataset loader)."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from augsplit.build import open_mapping
from augsplit.cli import main
from augsplit.data import Dataset
from augsplit.dataset import layout as lay
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from augsplit.verify import verify
from specs import spec_dict

VICTIM = "train-0000003"
DAMAGE = {  # column: (value, store, what the one line says)
    "class_index": (7, "none", "class index 7 out of range"),
    "instance": (99, "none", "asked for 99"),
    "scale": (-1.0, "none", "scale must be positive"),
    "tar_offset": (2 ** 62, "tar", f"tar_offset {2 ** 62} lies past the end of shards/split=train/part-000000.tar"),
    # another image of the dataset, or its own by another spelling: measured before, every reader
    # but verify served the other image's pixels, or read the path as it was
    "file": ("images/train/train-0000001.png", "files", "the row names 'images/train/train-0000001.png', not its own"),
    "file ": ("images//train/train-0000003.png", "files", "not its own image file"),
    # its identity: measured before, the loader re-rendered another index's stream (store none)
    "index": (5, "none", "image_id 'train-0000003' is not its split and index ('train', 5)"),
    "image_id": ("train-0000009", "none", "image_id 'train-0000009' is not its split and index ('train', 3)"),
    # the same with the image stored (found by review: export went on and named the image by the row)
    "index ": (5, "files", "image_id 'train-0000003' is not its split and index ('train', 5)"),
    "image_id ": ("train-0000009", "tar", "image_id 'train-0000009' is not its split and index ('train', 3)"),
}


def _named(column: str) -> str:
    """The image id a message names: the victim's, or an edited id as it now reads."""
    return DAMAGE["image_id"][0] if column.strip() == "image_id" else VICTIM


@pytest.fixture(scope="module")
def made(tmp_path_factory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("rows")
    built = open_mapping(spec_dict())
    out = {}
    for store in ("none", "tar", "files"):
        out[store] = base / store
        generate(None, out[store], Options(store=store, progress=False), built=built)
    return out


@pytest.fixture(params=sorted(DAMAGE))
def damaged(request, made, tmp_path):
    value, store, says = DAMAGE[request.param]
    column = request.param.strip()
    root = tmp_path / "ds"
    shutil.copytree(made[store], root)
    part = lay.part_path(root, lay.MANIFEST_DIR, "train", 0)
    t = pq.read_table(part)
    values = t.column(column).to_pylist()
    values[t.column("image_id").to_pylist().index(VICTIM)] = value
    k = t.schema.get_field_index(column)
    pq.write_table(t.set_column(k, t.schema.field(k), pa.array(values, t.schema.field(k).type)), part)
    return root, column, says


@pytest.mark.parametrize("command", ["preview", "export"])
def test_commands_name_the_damaged_row_in_one_line(damaged, tmp_path, capsys, command):
    root, column, says = damaged
    extra = ["--to", "coco"] if command == "export" else []
    code = main([command, str(root), *extra, "--out", str(tmp_path / "report")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err, err
    assert f"split train, image {_named(column)}: " in err and says in err, err


def test_the_loader_raises_a_dataset_error_naming_the_row(damaged):
    root, column, says = damaged
    ds = Dataset(root, "train")
    with pytest.raises(DatasetError, match=re.escape(says)) as err:
        for i in range(len(ds)):
            ds[i]
    assert _named(column) in str(err.value)


def test_verify_names_the_row_and_why(damaged):
    root, column, says = damaged
    rep = verify(root)
    # verify reads a shard archive in one pass: it names the offset against where the header is
    why = (says, column, "not their split and index")  # verify's identity check words it so
    assert not rep.ok and any(_named(column) in p and any(w in p for w in why) for p in rep.problems), rep.problems


def test_audit_names_the_row_and_why(damaged, tmp_path, capsys):
    root, column, says = damaged
    code = main(["audit", str(root), "--out", str(tmp_path / "report"), "--quiet"])
    err = capsys.readouterr().err
    assert code in (1, 2) and "Traceback" not in err, err
    if code == 2:  # refused before any check: one line naming the row
        assert err.count("\n") == 1 and _named(column) in err, err
        return
    import json

    report = json.loads((tmp_path / "report" / "audit.json").read_text())
    files = [c for c in report["checks"] if c["name"] == "image_files"]
    assert files and files[0]["verdict"] == "fail", [c["name"] for c in report["checks"] if c["verdict"] == "fail"]
    assert "images cannot be had" in files[0]["detail"] and _named(column) in files[0]["detail"], files[0]["detail"]
