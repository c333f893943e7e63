"""Bad inputs to every command past the spec (verify, preview, audit, score, assign, export,
generate on an existing folder) and to the Python entry points. Each case must give its exit
code (2 bad input), exactly one stderr line that names what and where, no traceback, and leave
the whole folder around the dataset exactly as it was (a checksum of the tree before and after).
The spec and option cases of `generate` and `plan` are in test_bad_inputs_spec.py; together they
are the bad-input corpus of the project (reference: the exit-code contract of DESIGN.md).
"""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pandas as pd
import pytest
from specs import refusal_line, snapshot, spec_dict, write_spec
from test_bad_inputs_spec import run_cli

from augsplit.build import open_mapping
from augsplit.generate import Options, generate

SPLITS = {"train": {"region": {"x": [8, 20]}, "per_class": 3}, "test": {"region": {"x": [44, 56]}, "per_class": 2}}
AXES = {"x": {"range": [8, 56]}, "y": {"range": [8, 56]}}  # objects stay whole: the spec gives no warning
SPEC = spec_dict(splits=SPLITS, axes=AXES)


@pytest.fixture(scope="module")
def template(tmp_path_factory) -> Path:
    """A finished dataset, its spec, predictions and two tables, copied into every case."""
    d = tmp_path_factory.mktemp("template")
    write_spec(d, SPEC)
    generate(None, d / "data", Options(progress=False, store="files"), built=open_mapping(SPEC))
    m = pd.read_parquet(d / "data" / "manifest")
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]}).to_csv(d / "pred.csv", index=False)
    pd.DataFrame({"split": ["train", "test"], "x": [9.0, 50.0], "y": [9.0, 10.0]}).to_csv(d / "t.csv", index=False)
    pd.DataFrame({"x": [9.0, 50.0], "y": [9.0, 10.0]}).to_csv(d / "nosplit.csv", index=False)
    (d / "notes.txt").write_text("the user's own file\n")
    return d


def unfinished(root: Path) -> None:
    (root / "data" / "dataset.json").unlink()


def garbage_spec_json(root: Path) -> None:
    (root / "data" / "spec.json").write_text("{not json")


def file_at(name: str, text: str = "x") -> Callable[[Path], None]:
    def make(root: Path) -> None:
        (root / name).write_text(text)
    return make


def link_at(name: str, target: str) -> Callable[[Path], None]:
    def make(root: Path) -> None:
        os.symlink(root / target, root / name)
    return make


def predictions(frame: dict | None = None, raw: bytes | None = None) -> Callable[[Path], None]:
    def make(root: Path) -> None:
        p = root / "bad_pred.csv"
        if raw is not None:
            p.write_bytes(raw)
        else:
            pd.DataFrame(frame).to_csv(p, index=False)
    return make


def another_spec(root: Path) -> None:
    (root / "other").mkdir()
    write_spec(root / "other", spec_dict(splits=SPLITS, axes=AXES, seed=2))


def user_files_in_out(root: Path) -> None:
    (root / "project").mkdir()
    (root / "project" / "src.py").write_text("print('mine')\n")
    (root / "project" / "manifest").mkdir()


@dataclass(frozen=True)
class Case:
    id: str
    args: tuple[str, ...]  # {d}: the case's folder
    says: tuple[str, ...]  # the one stderr line contains each of these
    make: Callable[[Path], None] | None = None
    code: int = 2


D, DATA, SP = "{d}", "{d}/data", "{d}/spec.yaml"

CASES = [
    # -- verify --
    Case("verify-missing", ("verify", f"{D}/nope"), ("nope",)),
    Case("verify-a-file", ("verify", f"{D}/notes.txt"), ("notes.txt",)),
    Case("verify-sample-zero", ("verify", DATA, "--sample", "0"), ("--sample",)),
    Case("verify-sample-negative", ("verify", DATA, "--sample", "-3"), ("--sample",)),
    Case("verify-sample-text", ("verify", DATA, "--sample", "abc"), ("--sample", "abc")),
    Case("verify-workers-zero", ("verify", DATA, "--workers", "0"), ("--workers",)),
    Case("verify-executor-bogus", ("verify", DATA, "--executor", "gpu"), ("--executor", "gpu")),
    Case("verify-unfinished", ("verify", DATA), ("--resume",), unfinished),
    Case("verify-empty-folder", ("verify", f"{D}/empty"), ("empty",), lambda r: (r / "empty").mkdir()),
    Case("verify-garbage-spec-json", ("verify", DATA), ("spec.json",), garbage_spec_json),
    # -- preview --
    Case("preview-per-split-zero", ("preview", DATA, "--per-split", "0"), ("--per-split",)),
    Case("preview-columns-negative", ("preview", DATA, "--columns", "-1"), ("--columns",)),
    Case("preview-missing", ("preview", f"{D}/nope"), ("nope",)),
    Case("preview-out-is-a-file", ("preview", DATA, "--out", f"{D}/notes.txt"), ("notes.txt",)),
    Case("preview-out-parent-missing", ("preview", DATA, "--out", f"{D}/no/such/folder"), ("no/such",)),
    Case("preview-unfinished", ("preview", DATA), ("--resume",), unfinished),
    Case("preview-out-dash", ("preview", DATA, "--out", "-"), ("-",)),
    # -- audit --
    Case("audit-threshold-text", ("audit", DATA, "--threshold", "hash_radius=abc"), ("--threshold hash_radius",)),
    Case("audit-threshold-negative", ("audit", DATA, "--threshold", "hash_radius=-1"), ("--threshold hash_radius",)),
    Case("audit-margin-negative", ("audit", DATA, "--threshold", "margin=-0.5"), ("--threshold margin",)),
    Case("audit-threshold-unknown", ("audit", DATA, "--threshold", "hash_radious=4"), ("hash_radious",)),
    Case("audit-threshold-no-equals", ("audit", DATA, "--threshold", "margin"), ("--threshold", "KEY=VALUE")),
    Case("audit-map-drops-a-read-column", ("audit", f"{D}/t.csv", "--axis", "x=0:64", "--map", "bogus=file"),
         ("--map",)),
    Case("audit-pair-unknown-split", ("audit", DATA, "--pair", "train:nosuch"), ("nosuch",)),
    Case("audit-pair-no-colon", ("audit", DATA, "--pair", "train"), ("--pair", "A:B")),
    Case("audit-missing-input", ("audit", f"{D}/nope.csv", "--axis", "x=0:64"), ("nope.csv",)),
    Case("audit-axis-bad", ("audit", f"{D}/t.csv", "--axis", "x=a:b"), ("--axis",)),
    Case("audit-table-without-split", ("audit", f"{D}/nosplit.csv", "--axis", "x=0:64", "--out", f"{D}/rep"),
         ("split",)),
    Case("audit-out-is-a-file", ("audit", DATA, "--out", f"{D}/notes.txt"), ("notes.txt",)),
    Case("audit-out-is-a-symlink", ("audit", DATA, "--out", f"{D}/ln"), ("ln",), link_at("ln", "notes.txt")),
    Case("audit-unfinished", ("audit", DATA), ("--resume",), unfinished),
    Case("audit-column-map-missing", ("audit", f"{D}/t.csv", "--column-map", f"{D}/map.yaml", "--axis", "x=0:64"),
         ("map.yaml",)),
    Case("audit-garbage-table", ("audit", f"{D}/junk.parquet", "--axis", "x=0:64", "--out", f"{D}/rep"),
         ("junk.parquet",), file_at("junk.parquet", "not parquet at all")),
    # -- score --
    Case("score-missing-predictions", ("score", DATA, f"{D}/nope.csv", "--out", f"{D}/rep"), ("nope.csv",)),
    Case("score-no-image-id", ("score", DATA, f"{D}/bad_pred.csv", "--out", f"{D}/rep"), ("image_id",),
         predictions({"id": ["a"], "predicted": ["b"]})),
    Case("score-empty-predictions", ("score", DATA, f"{D}/bad_pred.csv", "--out", f"{D}/rep"), ("bad_pred.csv",),
         predictions(raw=b"")),
    Case("score-garbage-predictions", ("score", DATA, f"{D}/bad_pred.csv", "--out", f"{D}/rep"), ("bad_pred.csv",),
         predictions(raw=b"\x00\xff\x10garbage\n\x00")),
    Case("score-partial", ("score", DATA, f"{D}/bad_pred.csv", "--out", f"{D}/rep"), ("--allow-partial",),
         predictions({"image_id": ["train-0000000"], "predicted": ["P3-00"]})),
    Case("score-unknown-class", ("score", DATA, f"{D}/bad_pred.csv", "--allow-partial", "--out", f"{D}/rep"), ("zebra",),
         predictions({"image_id": ["train-0000000"], "predicted": ["zebra"]})),
    Case("score-train-split-unknown", ("score", DATA, f"{D}/pred.csv", "--train-split", "nosuch", "--out", f"{D}/rep"),
         ("--train-split", "nosuch")),
    Case("score-reference-split-unknown",
         ("score", DATA, f"{D}/pred.csv", "--reference-split", "nosuch", "--out", f"{D}/rep"),
         ("--reference-split", "nosuch")),
    Case("score-out-is-a-file", ("score", DATA, f"{D}/pred.csv", "--out", f"{D}/notes.txt"), ("notes.txt",)),
    Case("score-unfinished", ("score", DATA, f"{D}/pred.csv", "--out", f"{D}/rep"), ("--resume",), unfinished),
    Case("score-dataset-missing", ("score", f"{D}/nope", f"{D}/pred.csv", "--out", f"{D}/rep"), ("nope",)),
    # -- assign --
    Case("assign-missing-table", ("assign", SP, f"{D}/nope.csv", "--out", f"{D}/o.csv"), ("nope.csv",)),
    Case("assign-out-is-the-input", ("assign", SP, f"{D}/t.csv", "--out", f"{D}/t.csv"), ("input",)),
    Case("assign-out-xlsx", ("assign", SP, f"{D}/t.csv", "--replace-split", "--out", f"{D}/o.xlsx"), ("o.xlsx",)),
    Case("assign-text-in-a-number-column", ("assign", SP, f"{D}/words.csv", "--out", f"{D}/o.csv"), ("x",),
         file_at("words.csv", "x,y\nleft,9\n")),
    Case("assign-existing-split-column", ("assign", SP, f"{D}/t.csv", "--out", f"{D}/o.csv"), ("--replace-split",)),
    Case("assign-boxes-bogus", ("assign", SP, f"{D}/t.csv", "--boxes", "ltrb"), ("--boxes", "ltrb")),
    Case("assign-mixed-bogus", ("assign", SP, f"{D}/t.csv", "--mixed", "merge"), ("--mixed", "merge")),
    Case("assign-missing-spec", ("assign", f"{D}/nope.yaml", f"{D}/t.csv", "--out", f"{D}/o.csv"), ("nope.yaml",)),
    # -- export --
    Case("export-to-bogus", ("export", DATA, "--to", "pascal", "--out", f"{D}/ex"), ("--to", "pascal")),
    Case("export-out-not-ours", ("export", DATA, "--to", "coco", "--out", f"{D}/mine"), ("mine",),
         lambda r: ((r / "mine").mkdir(), (r / "mine" / "keep.txt").write_text("mine"))),
    Case("export-out-dash", ("export", DATA, "--to", "coco", "--out", "-"), ("-",)),
    Case("export-out-inside-the-dataset", ("export", DATA, "--to", "tar", "--out", f"{DATA}/exported"), ("exported",)),
    Case("export-missing-dataset", ("export", f"{D}/nope", "--to", "tar", "--out", f"{D}/ex"), ("nope",)),
    Case("export-unfinished", ("export", DATA, "--to", "tar", "--out", f"{D}/ex"), ("--resume",), unfinished),
    # -- generate on an existing folder --
    Case("generate-resume-another-spec", ("generate", f"{D}/other/spec.yaml", "--out", DATA, "--resume"),
         ("another spec",), another_spec),
    Case("generate-out-is-a-file", ("generate", SP, "--out", f"{D}/notes.txt"), ("notes.txt",)),
    Case("generate-finalize-not-a-dataset", ("generate", "--finalize", "--out", f"{D}/empty"), ("empty",),
         lambda r: (r / "empty").mkdir()),
    Case("generate-overwrite-user-files", ("generate", SP, "--out", f"{D}/project", "--overwrite"), ("src.py",),
         user_files_in_out),
    Case("generate-exists-without-resume", ("generate", SP, "--out", DATA), ("--resume",)),
    # -- found by a new user's walk-through (each was misleading before) --
    Case("generate-out-empty", ("generate", SP, "--out", ""), ("--out ''", "name is empty")),
    Case("export-out-empty", ("export", DATA, "--to", "coco", "--out", ""), ("--out ''", "name is empty")),
    Case("generate-shard-of-zero-jobs", ("generate", SP, "--out", f"{D}/sh", "--shard", "1/0"),
         ("--shard", "N, the number of jobs, must be at least 1")),
    Case("audit-dataset-without-spec-json", ("audit", DATA), ("not an augsplit dataset (no spec.json)",),
         lambda r: (r / "data" / "spec.json").unlink()),
    Case("plan-region-number-as-text", ("plan", f"{D}/text.yaml"), ("'5.6e1' is text to YAML, not a number",),
         file_at("text.yaml", "seed: 1\ncanvas: {width: 64, height: 64, mode: gray}\n"
                 "objects: {kind: polyomino, cells: 3, cell_px: 4}\naxes: {x: {range: [0, 64]}}\n"
                 "splits:\n  train: {region: {x: [0, 20]}, per_class: 2}\n"
                 "  test: {region: {x: [40, 5.6e1]}, per_class: 2}\n")),
    # -- the command line itself --
    Case("unknown-command", ("frobnicate",), ("frobnicate",)),
    Case("verify-without-dataset", ("verify",), ("dataset",)),
]


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(case: Case, template: Path, tmp_path: Path, capfd):
    d = tmp_path / "work"
    shutil.copytree(template, d, symlinks=True)
    if case.make is not None:
        case.make(d)
    before = snapshot(tmp_path)
    capfd.readouterr()
    code, err = run_cli([a.replace("{d}", str(d)) for a in case.args], False, capfd)
    refusal_line(code, err, case.code, case.says)
    assert snapshot(tmp_path) == before, "the folder around the dataset changed"


# ---- the Python entry points ------------------------------------------------------------------


def _entry_points(d: Path):
    import augsplit

    return {
        "Dataset-unknown-split": lambda: augsplit.Dataset(d / "data", split="nosuch"),
        "Dataset-unfinished": lambda: (unfinished(d), augsplit.Dataset(d / "data", split="train")),
        "Dataset-bad-target": lambda: augsplit.Dataset(d / "data", split="train", target="colour"),
        "open_dataset-missing": lambda: augsplit.open_dataset(d / "nope"),
        "OnlineSampler-unknown-split": lambda: augsplit.OnlineSampler(str(d / "spec.yaml"), "nosuch"),
        "audit_dataset-bad-threshold": lambda: augsplit.audit_dataset(d / "data", thresholds={"hash_radius": -1}),
        "score_predictions-missing": lambda: augsplit.score_predictions(d / "data", d / "nope.csv"),
        "generate_dataset-out-is-a-file": lambda: augsplit.generate_dataset(str(d / "spec.yaml"), d / "notes.txt"),
        "open_spec-missing": lambda: augsplit.open_spec(d / "nope.yaml"),
        "box-unknown-axis": lambda: augsplit.box(augsplit.open_spec(d / "spec.yaml").plan.space, z=(0, 1)),
    }


@pytest.mark.parametrize("name", sorted(_entry_points(Path("."))))
def test_python_entry_point_refuses_in_one_line(name, template: Path, tmp_path: Path):
    import augsplit

    d = tmp_path / "work"
    shutil.copytree(template, d, symlinks=True)
    call = _entry_points(d)[name]
    before = snapshot(tmp_path) if name != "Dataset-unfinished" else None
    with pytest.raises((augsplit.AugsplitError, ValueError)) as e:
        call()
    assert "\n" not in str(e.value) and str(e.value)
    if before is not None:
        assert snapshot(tmp_path) == before


def test_the_whole_corpus_is_large_enough():
    from test_bad_inputs_spec import CASES as SPEC_CASES

    assert len(CASES) + len(_entry_points(Path("."))) + len(SPEC_CASES) >= 120
    json.dumps([c.id for c in CASES])  # ids are plain text (they name the cases in CI output)
