"""Job-array shards: N uncoordinated jobs (started at once, as a cluster job array does) plus
--finalize equal one serial run byte for byte; bad shard numbers, missing shards and shards of
another spec are refused in one line with exit 2."""

from __future__ import annotations

import dataclasses
import shutil
import subprocess
import sys

import pytest
import yaml

from augsplit.cli import main
from augsplit.dataset import layout as lay
from augsplit.errors import DatasetError
from augsplit.generate import Options, finalize, generate
from specs import tree

SPEC = {
    "seed": 3,
    "canvas": {"width": 32, "height": 32, "mode": "gray"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
    "background": {"kind": "pink_noise", "mean": 0.5, "contrast": 0.1},
    "axes": {"x": {"range": [6, 26]}, "y": {"range": [6, 26]}, "scale": {"range": [0.8, 1.2]},
             "angle": {"range": [-30, 30]}},
    "splits": {"train": {"region": {"x": [6, 14]}, "count": 26}, "test": {"region": {"x": [18, 26]}, "count": 11}},
}
SIZE = 4  # 7 + 3 = 10 shards, so 4 jobs get 3, 3, 2 and 2 of them
SERIAL = Options(shard_size=SIZE, progress=False)  # the reference run (conftest.serial)
CLI = [sys.executable, "-m", "augsplit.cli"]


def cli(capsys, *args) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def test_four_jobs_started_at_once_then_finalize_equal_one_serial_run(spec_file, serial, tmp_path, capsys):
    out = tmp_path / "array"
    procs = [subprocess.Popen(CLI + ["generate", str(spec_file), "--out", str(out), "--shard", f"{k}/4",
                                     "--shard-size", str(SIZE), "--quiet"], stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for k in range(4)]
    for p in procs:
        stdout, stderr = p.communicate(timeout=120)
        assert p.returncode == 0, stderr
        assert "--finalize" in stdout  # each job says what to do once all are done
    assert not (out / lay.SUMMARY_FILE).exists()  # no job declares the dataset complete
    code, _o, err = cli(capsys, "generate", "--finalize", "--out", out)
    assert code == 0, err
    a, b = tree(serial), tree(out)
    assert sorted(a) == sorted(b)  # every manifest part, distractor part, image file, spec and summary
    assert [k for k in a if a[k] != b[k]] == []
    code, stdout, err = cli(capsys, "verify", out)
    assert code == 0 and "OK" in stdout, stdout + err


@pytest.mark.parametrize("shard", ["4/4", "-1/4", "0/0", "7/3"])
def test_shard_index_outside_range_is_exit_2_in_one_line(spec_file, tmp_path, capsys, shard):
    code, _out, err = cli(capsys, "generate", spec_file, "--out", tmp_path / "d", f"--shard={shard}")
    assert code == 2
    says = "N, the number of jobs, must be at least 1" if shard == "0/0" else "K must lie in"
    assert err.count("\n") == 1 and "--shard" in err and says in err
    assert not (tmp_path / "d").exists()


def test_shard_that_is_not_k_over_n_is_exit_2(spec_file, tmp_path):
    proc = subprocess.run(CLI + ["generate", str(spec_file), "--out", str(tmp_path / "d"), "--shard", "two"],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and "'two' is not K/N" in proc.stderr


def test_finalize_names_the_missing_shards(spec_file, tmp_path, capsys):
    out = tmp_path / "d"
    for k in (0, 2, 3):  # job 1 of 4 never ran: it makes global shards 1, 5 and 9
        generate(spec_file, out, Options(shard_size=SIZE, progress=False, array_shard=(k, 4)))
    code, _o, err = cli(capsys, "generate", "--finalize", "--out", out)
    assert code == 2 and err.count("\n") == 1
    assert "3 shard(s) missing" in err
    # global shards 1, 5 are train parts 1 and 5; global shard 9 is test part 2
    for name in ("train/part-000001 (shard #1 of 10)", "train/part-000005 (shard #5 of 10)",
                 "test/part-000002 (shard #9 of 10)"):
        assert name in err
    assert not (out / lay.SUMMARY_FILE).exists()


def test_a_job_of_another_spec_is_refused(spec_file, tmp_path, capsys):
    out = tmp_path / "d"
    generate(spec_file, out, Options(shard_size=SIZE, progress=False, array_shard=(0, 2)))
    other = tmp_path / "other.yaml"
    other.write_text(yaml.safe_dump(dict(SPEC, seed=4), sort_keys=False))
    code, _o, err = cli(capsys, "generate", other, "--out", out, "--shard", "1/2", "--shard-size", SIZE)
    assert code == 2 and "another spec" in err and err.count("\n") == 1


def test_finalize_refuses_a_part_copied_from_another_specs_dataset(spec_file, serial, tmp_path, capsys):
    other_spec = tmp_path / "other.yaml"
    other_spec.write_text(yaml.safe_dump(dict(SPEC, seed=4), sort_keys=False))
    other = tmp_path / "other"
    generate(other_spec, other, Options(shard_size=SIZE, progress=False))
    mixed = tmp_path / "mixed"
    shutil.copytree(serial, mixed)
    (mixed / lay.SUMMARY_FILE).unlink()
    stray = lay.part_path(mixed, lay.MANIFEST_DIR, "test", 1)
    shutil.copyfile(lay.part_path(other, lay.MANIFEST_DIR, "test", 1), stray)
    code, _o, err = cli(capsys, "generate", "--finalize", "--out", mixed)
    assert code == 2 and "another spec" in err and str(stray) in err
    assert not (mixed / lay.SUMMARY_FILE).exists()


def test_finalize_refuses_parts_no_shard_makes(spec_file, serial, tmp_path):
    mixed = tmp_path / "mixed"
    shutil.copytree(serial, mixed)
    shutil.copyfile(lay.part_path(mixed, lay.MANIFEST_DIR, "test", 0), lay.part_path(mixed, lay.MANIFEST_DIR, "test", 7))
    with pytest.raises(DatasetError, match="no shard of this spec makes"):
        finalize(mixed)


def test_overwrite_with_shard_is_refused(spec_file, serial, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(serial, copy)
    with pytest.raises(DatasetError, match="--overwrite cannot be combined with --shard"):
        generate(spec_file, copy, Options(shard_size=SIZE, progress=False, array_shard=(0, 2), overwrite=True))
    assert tree(copy) == tree(serial)  # nothing deleted


def test_finalize_sweeps_temporaries_left_by_killed_jobs(spec_file, serial, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(serial, copy)
    (copy / lay.SUMMARY_FILE).unlink()
    stray = copy / lay.IMAGES_DIR / "train" / ".train-0000003.png.tmp-999"
    stray.write_bytes(b"half an image")
    finalize(copy)
    assert not stray.exists() and tree(copy) == tree(serial)


def test_the_sweep_removes_only_regular_files_and_never_enters_a_linked_folder(serial, tmp_path):
    """The sweep of temporaries removes a regular file of one of its names and nothing that is a
    link: not a temporary-named link to a file, and nothing in a folder a split's link leads to."""
    from augsplit.dataset.create import remove_temporaries

    copy = tmp_path / "copy"
    shutil.copytree(serial, copy)
    outside = tmp_path / "outside"
    outside.mkdir()
    theirs = outside / ".train-0000001.png.tmp-5"  # a temporary's name, in a folder augsplit did not make
    theirs.write_bytes(b"someone's")
    target = tmp_path / "target.png"
    target.write_bytes(b"a file")
    link = copy / lay.IMAGES_DIR / "train" / ".train-0000002.png.tmp-6"
    link.symlink_to(target)
    (copy / lay.IMAGES_DIR / "linked").symlink_to(outside, target_is_directory=True)
    own = copy / lay.IMAGES_DIR / "train" / ".train-0000003.png.tmp-7"
    own.write_bytes(b"half an image")
    remove_temporaries(copy)
    assert not own.exists()
    assert link.is_symlink() and theirs.read_bytes() == b"someone's" and target.read_bytes() == b"a file"


def test_more_jobs_than_shards_is_harmless(spec_file, tmp_path):
    summary = generate(spec_file, tmp_path / "d", Options(shard_size=SIZE, progress=False, array_shard=(11, 12)))
    assert summary["images"] == 0 and summary["shards"] == 0


def test_a_job_array_peer_mid_start_is_not_mistaken_for_a_stranger(spec_file, tmp_path):
    """A peer has created the folder and its manifest/ but not yet renamed spec.json in."""
    out = tmp_path / "d"
    (out / lay.MANIFEST_DIR).mkdir(parents=True)
    (out / ".spec.json.tmp-123").write_text("{")
    generate(spec_file, out, Options(shard_size=SIZE, progress=False, array_shard=(0, 4)))
    assert (out / lay.SPEC_FILE).exists()
    stranger = tmp_path / "s"
    stranger.mkdir()
    (stranger / "notes.txt").write_text("mine")
    with pytest.raises(DatasetError, match="holds no augsplit dataset"):
        generate(spec_file, stranger, Options(shard_size=SIZE, progress=False, array_shard=(0, 4)))


@pytest.mark.parametrize("unseen", [1, 2])
def test_peers_racing_on_an_empty_folder_with_other_options_cannot_both_start(spec_file, tmp_path, monkeypatch,
                                                                              unseen):
    """Measured before: two job-array tasks started at once on an empty folder with different
    storage options each found no spec.json, each wrote theirs (the last rename won), and both
    went on: shards of two layouts in one folder. Now spec.json is created only where none is
    (hard-linked into place, never renamed over), and a peer that finds one there, however late,
    goes on only if it records the same run. Peer A starts with --png-level 1; peer B, with
    --png-level 2, checks the folder in the instant before A's spec.json appears (its first
    `unseen` looks find none) and must stop with one line, leaving A's spec.json and no part."""
    import pathlib

    out = tmp_path / "d"
    a = Options(shard_size=SIZE, progress=False, array_shard=(0, 4), png_level=1)
    generate(spec_file, out, a)
    before = (out / lay.SPEC_FILE).read_bytes()
    parts = sorted(p.name for p in out.rglob("part-*"))
    real, looks = pathlib.Path.exists, []

    def exists(self, *args, **kwargs):
        if self.name == lay.SPEC_FILE and len(looks) < unseen:
            looks.append(self)
            return False
        return real(self, *args, **kwargs)

    monkeypatch.setattr(pathlib.Path, "exists", exists)
    with pytest.raises(DatasetError, match="other storage options; rerun with --png-level 1"):
        generate(spec_file, out, dataclasses.replace(a, array_shard=(1, 4), png_level=2))
    monkeypatch.undo()
    assert len(looks) == unseen
    assert (out / lay.SPEC_FILE).read_bytes() == before
    assert sorted(p.name for p in out.rglob("part-*")) == parts
    assert not [p for p in out.iterdir() if lay.is_temporary(p.name)]


# ---- two runs on one folder ------------------------------------------------------------------
# Measured before: a second `--resume` on a folder another run was writing swept that run's
# temporaries, and the first run failed with "cannot write: No such file or directory".


def _held(folder, shared: bool):
    """A lock on the folder as another augsplit process holds it (flock on the folder)."""
    import fcntl
    import os

    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    fcntl.flock(fd, (fcntl.LOCK_SH if shared else fcntl.LOCK_EX) | fcntl.LOCK_NB)
    return fd


@pytest.fixture
def unfinished(spec_file, tmp_path):
    out = tmp_path / "d"
    generate(spec_file, out, dataclasses.replace(SERIAL, array_shard=(0, 2)))
    its_own = lay.part_path(out, lay.MANIFEST_DIR, "train", 1).parent / ".part-000001.parquet.tmp-77-abcdef"
    its_own.write_bytes(b"the other run is writing this")
    return out


@pytest.mark.parametrize("args", [("--resume",), ("--overwrite",), ("--finalize",)])
def test_a_whole_run_is_refused_and_touches_nothing_while_another_run_writes(spec_file, unfinished, capsys, args):
    import os

    fd = _held(unfinished, shared=True)  # a job-array task at work
    try:
        before = tree(unfinished)
        spec = () if "--finalize" in args else (spec_file,)
        code, _o, err = cli(capsys, "generate", *spec, "--out", unfinished, "--shard-size", str(SIZE), *args)
        assert code == 2 and err.count("\n") == 1 and "another augsplit run is writing this folder" in err, err
        assert tree(unfinished) == before
    finally:
        os.close(fd)


def test_job_array_tasks_share_a_folder_but_not_with_a_whole_run(spec_file, unfinished, capsys):
    import os

    fd = _held(unfinished, shared=True)
    try:  # another task of the same array may work beside it
        code, _o, err = cli(capsys, "generate", spec_file, "--out", unfinished, "--shard-size", str(SIZE), "--shard", "1/2")
        assert code == 0, err
    finally:
        os.close(fd)
    fd = _held(unfinished, shared=False)
    try:  # a whole run at work: no task joins it
        before = tree(unfinished)
        code, _o, err = cli(capsys, "generate", spec_file, "--out", unfinished, "--shard-size", str(SIZE), "--shard", "1/2")
        assert code == 2 and "another augsplit run is writing this folder" in err, err
        assert tree(unfinished) == before
    finally:
        os.close(fd)
    code, _o, err = cli(capsys, "generate", "--finalize", "--out", unfinished)  # free again
    assert code == 0, err


def test_the_lock_is_let_go_when_a_run_fails(spec_file, unfinished):
    with pytest.raises(DatasetError):  # refused after the lock was taken: another shard size
        generate(spec_file, unfinished, dataclasses.replace(SERIAL, shard_size=SIZE + 1, resume=True))
    fd = _held(unfinished, shared=False)  # nobody holds it any more
    __import__("os").close(fd)
