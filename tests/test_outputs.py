"""Every `--out` of every command that writes, on a missing path, a regular file, a symlink,
a FIFO, a device, a folder and `-`: what is written, what is refused in one line (exit 2),
and that a refused target (and what a symlink points to) is left exactly as it was.
Also read-only file systems and missing folders: one line, exit 2, no traceback."""

from __future__ import annotations

import io
import json
import os
import signal
import stat
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from specs import spec_dict, write_spec

from augsplit.build import open_mapping
from augsplit.cli import main
from augsplit.generate import Options, generate
from augsplit.dataset import read_manifest

KINDS = ("missing", "file", "symlink", "fifo", "device", "folder", "dash")
SPLITS = {"train": {"region": {"x": [8, 20]}, "per_class": 3}, "test": {"region": {"x": [44, 56]}, "per_class": 2}}
# objects stay inside the canvas, so the spec gives no plan warning: a refusal is the only line
AXES = {"x": {"range": [8, 56]}, "y": {"range": [8, 56]}}
OLD = b"the user's own bytes\n"


@pytest.fixture(autouse=True)
def _no_hang():
    # opening a FIFO for writing blocks until a reader comes: a regression must fail, not hang
    signal.signal(signal.SIGALRM, lambda *_: (_ for _ in ()).throw(TimeoutError("blocked on an output")))
    signal.alarm(120)
    yield
    signal.alarm(0)


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    """A spec, a table, a dataset and its predictions."""
    d = tmp_path_factory.mktemp("world")
    spec = write_spec(d, spec_dict(splits=SPLITS, axes=AXES))
    pd.DataFrame({"split": ["train", "test", "train", "test"], "x": [9.0, 50, 11, 55],
                  "y": [9.0, 10, 11, 12]}).to_csv(d / "t.csv", index=False)
    data = d / "data"
    generate(None, data, Options(progress=False, store="none"), built=open_mapping(spec_dict(splits=SPLITS, axes=AXES)))
    m = read_manifest(data)
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]}).to_csv(d / "pred.csv", index=False)
    return {"spec": spec, "table": d / "t.csv", "data": data, "pred": d / "pred.csv"}


def command(name: str, w: dict, out) -> list[str]:
    return {
        "assign": ["assign", str(w["spec"]), str(w["table"]), "--replace-split", "--out", str(out)],
        "audit": ["audit", str(w["table"]), "--axis", "x=0:64", "--quiet", "--out", str(out)],
        "score": ["score", str(w["data"]), str(w["pred"]), "--out", str(out)],
        "preview": ["preview", str(w["data"]), "--per-split", "2", "--out", str(out)],
        "generate": ["generate", str(w["spec"]), "--store", "none", "--quiet", "--out", str(out)],
    }[name]


def make_target(kind: str, where: Path, file_name: bool) -> tuple[str, Path | None]:
    """The --out argument for `kind`, and the path whose state must not change when refused
    (the symlink's target for a symlink)."""
    p = where / ("out.csv" if file_name else "out")
    if kind == "missing":
        return str(p), None
    if kind == "dash":
        return "-", None
    if kind == "file":
        p.write_bytes(OLD)
    elif kind == "symlink":
        target = where / ("elsewhere.csv" if file_name else "elsewhere")
        target.mkdir() if not file_name else target.write_bytes(OLD)
        p.symlink_to(target)
        return str(p), target
    elif kind == "fifo":
        os.mkfifo(p)
    elif kind == "device":
        try:  # a null device of our own (1, 3), so nothing outside the test folder is at risk
            os.mknod(p, stat.S_IFCHR | 0o666, os.makedev(1, 3))
        except (PermissionError, OSError):
            pytest.skip("cannot make a device node here")
    elif kind == "folder":
        p.mkdir()
    return str(p), p


def state(p: Path):
    st = os.lstat(p)
    body = (p.read_bytes() if stat.S_ISREG(st.st_mode) else sorted(os.listdir(p)) if stat.S_ISDIR(st.st_mode)
            else os.readlink(p) if stat.S_ISLNK(st.st_mode) else None)
    return stat.S_IFMT(st.st_mode), st.st_ino, body


def run(argv, capsys):
    code = main(argv)
    cap = capsys.readouterr()
    return code, cap.out, cap.err


# command -> kind -> "written" (exit 0, output where asked), "stdout" (exit 0, the document on
# stdout, no file named "-"), or "refused" (exit 2, one line naming the path, nothing changed)
EXPECT = {
    "assign": dict(missing="written", file="written", symlink="refused", fifo="refused", device="refused",
                   folder="refused", dash="stdout"),
    **{c: dict(missing="written", file="refused", symlink="refused", fifo="refused", device="refused",
               folder="written", dash="stdout") for c in ("audit", "score")},
    **{c: dict(missing="written", file="refused", symlink="refused", fifo="refused", device="refused",
               folder="written", dash="refused") for c in ("preview", "generate")},
}


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("name", list(EXPECT))
def test_out_matrix(name, kind, world, tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)  # a file named "-" would land here
    arg, guarded = make_target(kind, tmp_path, file_name=name == "assign")
    before = state(guarded) if guarded is not None else None
    code, out, err = run(command(name, world, arg), capsys)
    expect = EXPECT[name][kind]
    assert not (tmp_path / "-").exists()
    if expect == "refused":
        assert code == 2, err
        assert err.count("\n") == 1 and err.startswith(f"augsplit {name}: error: ") and arg in err
        if guarded is not None:
            assert state(guarded) == before
        return
    assert code == 0, err
    if expect == "stdout":
        if name == "assign":
            got = pd.read_csv(io.StringIO(out))
            assert list(got["split"]) == ["train", "test", "train", "test"]
        else:
            doc = json.loads(out)  # stdout is exactly one JSON document
            assert doc["verdict"] if name == "audit" else doc["by_split"]
        return
    p = Path(arg)
    if name == "assign":
        assert list(pd.read_csv(p)["split"]) == ["train", "test", "train", "test"]
    else:
        first = {"audit": "audit.json", "score": "score.json", "preview": "coverage.png", "generate": "dataset.json"}
        assert stat.S_ISDIR(os.lstat(p).st_mode) and (p / first[name]).is_file()


def test_assign_never_replaces_its_input(world, tmp_path, capsys):
    t = tmp_path / "t.csv"
    t.write_bytes(world["table"].read_bytes())
    before = t.read_bytes()
    for out in (t, tmp_path / "." / "t.csv", tmp_path / "hard.csv"):
        if out.name == "hard.csv":
            os.link(t, out)  # the same file by another name
        code, _, err = run(["assign", str(world["spec"]), str(t), "--out", str(out)], capsys)
        assert code == 2 and "input" in err and err.count("\n") == 1
        assert t.read_bytes() == before


def test_assign_refuses_an_output_inside_its_input_folder(world, tmp_path, capsys):
    folder = tmp_path / "parts"
    folder.mkdir()
    pd.read_csv(world["table"]).to_parquet(folder / "a.parquet")
    code, _, err = run(["assign", str(world["spec"]), str(folder), "--out", str(folder / "labelled.parquet")], capsys)
    assert code == 2 and "inside the input folder" in err
    assert sorted(os.listdir(folder)) == ["a.parquet"]


@pytest.mark.parametrize("ext", [".xlsx", ".json", ""])
def test_assign_refuses_unknown_output_types(world, tmp_path, capsys, ext):
    out = tmp_path / f"x{ext}"
    code, _, err = run(["assign", str(world["spec"]), str(world["table"]), "--replace-split", "--out", str(out)], capsys)
    assert code == 2 and "use .csv, .tsv or .parquet" in err and err.count("\n") == 1
    assert not out.exists()


@pytest.mark.parametrize("ext", [".csv", ".tsv", ".parquet"])
def test_assign_writes_the_type_its_extension_names(world, tmp_path, capsys, ext):
    out = tmp_path / f"x{ext}"
    code, _, err = run(["assign", str(world["spec"]), str(world["table"]), "--replace-split", "--out", str(out)], capsys)
    assert code == 0, err
    got = pd.read_parquet(out) if ext == ".parquet" else pd.read_csv(out, sep="\t" if ext == ".tsv" else ",")
    assert list(got.columns) == ["split", "x", "y"]  # the input's columns, split relabelled
    assert list(got["split"]) == ["train", "test", "train", "test"]


def test_assign_default_output_follows_the_input_type(world, tmp_path, capsys):
    pq_in = tmp_path / "t.parquet"
    pd.read_csv(world["table"]).to_parquet(pq_in)
    assert run(["assign", str(world["spec"]), str(pq_in), "--replace-split"], capsys)[0] == 0
    assert len(pd.read_parquet(tmp_path / "t.assigned.parquet")) == 4  # Parquet in, Parquet out
    tsv_in = tmp_path / "t.tsv"
    pd.read_csv(world["table"]).to_csv(tsv_in, sep="\t", index=False)
    assert run(["assign", str(world["spec"]), str(tsv_in), "--replace-split"], capsys)[0] == 0
    assert "\t" in (tmp_path / "t.assigned.tsv").read_text().splitlines()[0]


# ---- a folder that is missing, or on a read-only file system -------------------------------

FILE_WRITERS = ("assign", "audit", "score")


@pytest.mark.parametrize("name", FILE_WRITERS + ("preview",))
def test_out_in_a_missing_folder_is_one_line(name, world, tmp_path, capsys):
    out = tmp_path / "no" / ("x.csv" if name == "assign" else "rep")
    code, _, err = run(command(name, world, out), capsys)
    assert code == 2 and err.count("\n") == 1 and "no such folder" in err and str(tmp_path / "no") in err
    assert not (tmp_path / "no").exists()


@pytest.fixture
def read_only(tmp_path):
    """A folder on a read-only file system (chmod does not stop root, so a read-only mount)."""
    ro = tmp_path / "ro"
    ro.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(ro)], capture_output=True)
    if r.returncode != 0:
        pytest.skip(f"mount not permitted: {r.stderr.decode().strip()}")
    try:
        (ro / "existing").mkdir()
        subprocess.run(["mount", "-o", "remount,ro", str(ro)], check=True, capture_output=True)
        yield ro
    finally:
        subprocess.run(["umount", str(ro)], capture_output=True)


@pytest.mark.parametrize("name", FILE_WRITERS + ("preview", "generate"))
@pytest.mark.parametrize("inside", ["new", "existing"])
def test_out_on_a_read_only_file_system_is_one_line(name, inside, world, read_only, capsys):
    folder = read_only / "existing" if inside == "existing" else read_only
    out = folder / "x.csv" if name == "assign" else folder if inside == "existing" else folder / "rep"
    code, _, err = run(command(name, world, out), capsys)
    assert code == 2 and err.count("\n") == 1 and "read-only file system" in err.lower(), err


def test_cli_refusal_has_no_traceback(world, tmp_path):
    """The same refusals through a real process: one stderr line, exit 2."""
    f = tmp_path / "afile"
    f.write_bytes(OLD)
    r = subprocess.run([sys.executable, "-m", "augsplit.cli", *command("audit", world, f)], capture_output=True,
                       text=True, timeout=120)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
    assert f.read_bytes() == OLD
