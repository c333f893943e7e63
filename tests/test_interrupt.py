"""Interruption and hostile storage: Ctrl-C and SIGKILL of a real `augsplit generate --workers 2`
after some shards are committed, then --resume, give the bytes of an uninterrupted run; an
output path that is a file, no permission, a read-only file system and a full disk are one
line and exit 2, with every completed shard kept whole."""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from augsplit.cli import main
from augsplit.dataset import layout as lay
from augsplit.dataset import read_manifest
from augsplit.generate import Options, generate
from specs import tree

SPEC = {
    "seed": 17,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 2, "cell_px": 3, "colour": [230, 200, 30]},
    "background": {"kind": "uniform_noise", "lo": 0.0, "hi": 0.3},
    "axes": {"x": {"range": [5, 19]}, "y": {"range": [5, 19]}, "angle": {"range": [0, 360]},
             "hue": {"range": [0, 360]}},
    "splits": {"train": {"region": {"x": [5, 10]}, "count": 400}, "test": {"region": {"x": [14, 19]}, "count": 100}},
}
SIZE = 5  # 100 shards: a run lasts long enough to be cut after its first commits
SERIAL = Options(shard_size=SIZE, progress=False)  # the reference run (conftest.serial)
CLI = [sys.executable, "-m", "augsplit.cli"]


def committed(out: Path) -> list[Path]:
    return lay.part_files(out) if out.exists() else []


def assert_commits_are_whole(out: Path) -> None:
    """Every committed part has all its rows, and every row's image is there in full."""
    for part in committed(out):
        t = pq.read_table(part, columns=["index", "file"])
        assert t.num_rows == SIZE or part.name != "part-000000.parquet"
        for rel in t.column("file").to_pylist():
            assert (out / rel).stat().st_size > 0, rel


def ctrl_c_as_in_a_terminal() -> None:
    """In the child before it runs: Ctrl-C's default action, as a command typed in a terminal
    has it. A test run started in the background (`cmd &` in a script) hands its children
    SIGINT ignored, and Python then never turns it into KeyboardInterrupt (CI once ran so)."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def start(spec_file: Path, out: Path, *extra: str) -> subprocess.Popen:
    # a session of its own, so the test can send Ctrl-C to the whole group as a terminal does
    return subprocess.Popen(CLI + ["generate", str(spec_file), "--out", str(out), "--workers", "2",
                                   "--shard-size", str(SIZE), "--quiet", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True,
                            preexec_fn=ctrl_c_as_in_a_terminal)


def wait_for_commits(proc: subprocess.Popen, out: Path, n: int = 2, limit_s: float = 60.0) -> None:
    t0 = time.monotonic()
    while len(committed(out)) < n:
        assert proc.poll() is None, f"the run ended before it could be interrupted: {proc.communicate()}"
        assert time.monotonic() - t0 < limit_s, "no shard was committed in time"
        time.sleep(0.01)


def group_gone(pgid: int, limit_s: float = 10.0) -> bool:
    t0 = time.monotonic()
    while time.monotonic() - t0 < limit_s:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return True
        time.sleep(0.05)
    return False


def resume_and_compare(spec_file: Path, out: Path, serial: Path, cli: bool = False) -> None:
    """--resume (through the CLI, or the same call in-process, which is quicker) must give the
    serial bytes: nothing lost, nothing extra, no temporaries."""
    if cli:
        proc = subprocess.run(CLI + ["generate", str(spec_file), "--out", str(out), "--workers", "2", "--shard-size",
                                     str(SIZE), "--resume", "--quiet"], capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, proc.stderr
    else:
        generate(spec_file, out, Options(shard_size=SIZE, workers=2, resume=True, progress=False))
    a, b = tree(serial), tree(out)
    assert sorted(a) == sorted(b), (set(a) ^ set(b))
    assert [k for k in a if a[k] != b[k]] == []
    df = read_manifest(out)
    assert len(df) == 500 and not df["image_id"].duplicated().any()


def test_ctrl_c_then_resume_gives_the_uninterrupted_bytes(spec_file, serial, tmp_path):
    out = tmp_path / "ds"
    proc = start(spec_file, out)
    wait_for_commits(proc, out)
    os.killpg(proc.pid, signal.SIGINT)  # what Ctrl-C in a terminal does: the whole group
    _stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130
    assert stderr.strip().splitlines() == ["augsplit generate: interrupted; rerun with --resume to continue"]
    assert group_gone(proc.pid)  # no worker outlives the run
    assert not (out / lay.SUMMARY_FILE).exists() and len(committed(out)) < 100
    assert_commits_are_whole(out)
    resume_and_compare(spec_file, out, serial, cli=True)


def test_ctrl_c_of_a_dask_run_then_resume_gives_the_uninterrupted_bytes(spec_file, serial, tmp_path):
    """The same Ctrl-C on the dask executor (a LocalCluster of 2 worker processes, whose nannies
    get the terminal's Ctrl-C too): one line and exit 130, no process of the run left behind,
    every committed shard whole, and --resume gives the serial bytes."""
    pytest.importorskip("distributed")
    out = tmp_path / "ds"
    proc = start(spec_file, out, "--executor", "dask")
    wait_for_commits(proc, out, limit_s=120.0)
    os.killpg(proc.pid, signal.SIGINT)
    _stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 130, stderr[-2000:]
    assert stderr.strip().splitlines() == ["augsplit generate: interrupted; rerun with --resume to continue"]
    assert group_gone(proc.pid, limit_s=20.0)
    assert not (out / lay.SUMMARY_FILE).exists() and len(committed(out)) < 100
    assert_commits_are_whole(out)
    resume_and_compare(spec_file, out, serial)


@pytest.mark.parametrize("mode, most_lines", [("processes", 300), ("overlapped", 500), ("pool-overlapped", 1000)])
def test_a_ctrl_c_at_any_line_of_the_executor_code_stops_the_run_clean(mode, most_lines):
    """The executor's side of the test above, at every moment instead of one: CI once saw that
    run print 'interrupted' and then never exit. A Ctrl-C landing inside concurrent.futures.wait
    (which takes every pending future's lock in a Python loop), in a worker's start before
    the pool registered it, or in the pool's thread start, left a lock held or a worker
    unregistered, and the interpreter's exit waited for them forever (measured before the
    change: 3 of the first 320 lines failed, and the script hung). The serial executor that
    commits each shard on a thread while the next renders is put through the same: no
    finishing thread left, no commit cut short, no shard neither committed nor discarded."""
    proc = subprocess.run([sys.executable, str(Path(__file__).with_name("ctrl_c_anywhere.py")), mode],
                          capture_output=True, text=True, timeout=600, preexec_fn=ctrl_c_as_in_a_terminal)
    assert proc.returncode == 0, proc.stderr[-3000:]
    report = json.loads(proc.stdout)
    assert report["bad"] == []
    assert report["tried"] == report["lines"] > most_lines  # every line of a whole run was tried
    assert report["stopped"] > report["tried"] * 0.9  # and nearly every trial ended by the Ctrl-C


def test_sigkill_of_the_driver_then_resume_gives_the_uninterrupted_bytes(spec_file, serial, tmp_path):
    out = tmp_path / "ds"
    proc = start(spec_file, out)
    wait_for_commits(proc, out)
    os.kill(proc.pid, signal.SIGKILL)  # only the driver: its workers must not live on as orphans
    proc.communicate(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    alive = not group_gone(proc.pid)
    if alive:
        os.killpg(proc.pid, signal.SIGKILL)
    assert not alive, "worker processes outlived their killed driver"
    assert not (out / lay.SUMMARY_FILE).exists()
    assert_commits_are_whole(out)
    resume_and_compare(spec_file, out, serial)


class Crash(Exception):
    pass


def test_a_crash_between_a_shards_images_and_its_part_leaves_a_shard_resume_remakes(spec_file, serial, tmp_path,
                                                                                    monkeypatch):
    """Images are written straight to their final names and only the part commits a shard. A
    crash after a shard's images are on disk (one half-written, as a kill mid-write leaves it)
    and before its part: the shard is not counted, and a resumed run remakes every image of it
    (the serial bytes, no temporaries, nothing extra)."""
    import augsplit.generate as gen

    out = tmp_path / "ds"
    real, calls = gen.sync_in_folder, []

    def crash_on_the_third_shard(folder, identity, names):
        calls.append([os.path.join(folder, n) for n in names])
        if len(calls) == 3:
            raise Crash
        real(folder, identity, names)

    monkeypatch.setattr(gen, "sync_in_folder", crash_on_the_third_shard)
    with pytest.raises(Crash):
        generate(spec_file, out, SERIAL)
    monkeypatch.undo()
    images = [Path(p) for p in calls[-1]]
    assert len(committed(out)) == 2 and len(images) == SIZE and all(p.is_file() for p in images)
    # the fourth shard, rendered while the third committed, was abandoned: no part of it
    assert not list((out / lay.MANIFEST_DIR).rglob(".*.tmp-*"))
    images[1].write_bytes(images[1].read_bytes()[:10])
    resume_and_compare(spec_file, out, serial)


def test_a_serial_run_commits_each_shard_while_it_renders_the_next(spec_file, serial, tmp_path, monkeypatch):
    """Measured before: a serial run synced each shard's files (a wait on the disk: 30-35 us per
    image on this machine's ext4, most of what kept `--store files` at 1.7x the bare loop) before
    it rendered the next shard. Now the sync of shard k runs while shard k+1 renders: the first
    shard's sync sees the second shard's rendering begin. The bytes are the serial run's."""
    import threading

    import augsplit.generate as gen

    second_renders = threading.Event()
    real_render, real_sync, overlapped = gen._render_rows, gen.sync_in_folder, []

    def render(built, split, job, *args):
        if (job.split, job.shard) == ("train", 1):
            second_renders.set()
        return real_render(built, split, job, *args)

    def sync(*args):
        if not overlapped:  # the first shard's sync
            overlapped.append(second_renders.wait(timeout=10))
        real_sync(*args)

    monkeypatch.setattr(gen, "_render_rows", render)
    monkeypatch.setattr(gen, "sync_in_folder", sync)
    out = tmp_path / "ds"
    generate(spec_file, out, SERIAL)
    assert overlapped == [True]
    a, b = tree(serial), tree(out)
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []


def test_local_workers_leave_every_commit_to_the_driver(spec_file, serial, tmp_path, monkeypatch):
    """Measured before: each pool worker synced and committed its own shard, idle while the disk
    caught up (about 10% of a worker's time in a 2-worker `--store files` run of 20,000 images
    on ext4). Now the workers render and write, and the driver syncs and commits every shard
    while they render the next ones. The bytes are the serial run's."""
    import augsplit.generate as gen

    log = tmp_path / "who-commits"
    real_sync, real_move = gen.sync_in_folder, gen.move_into_place

    def note(what):
        with open(log, "a") as f:  # a worker's memory is its own: the file is shared
            f.write(f"{what} {os.getpid()}\n")

    def sync(*args):
        note("sync")
        real_sync(*args)

    def move(moves):
        note("commit")
        real_move(moves)

    monkeypatch.setattr(gen, "sync_in_folder", sync)
    monkeypatch.setattr(gen, "move_into_place", move)
    out = tmp_path / "ds"
    generate(spec_file, out, Options(shard_size=SIZE, workers=2, progress=False))
    calls = [line.split() for line in log.read_text().splitlines()]
    assert [c for c in calls if c[0] == "commit"] == [["commit", str(os.getpid())]] * 100  # every shard, here
    assert {pid for _what, pid in calls} == {str(os.getpid())}
    a, b = tree(serial), tree(out)
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []


def test_a_ctrl_c_while_the_next_shard_renders_lets_the_commit_under_way_land(spec_file, serial, tmp_path,
                                                                              monkeypatch):
    """Ctrl-C lands while shard 3 renders and shard 2 is still syncing: when generate gives up,
    shard 2's commit has landed whole, shard 3 left no part (nor a temporary of one), and a
    resumed run gives the serial bytes."""
    import augsplit.generate as gen

    real_render, real_sync, calls = gen._render_rows, gen.sync_in_folder, []

    def render(built, split, job, *args):
        if (job.split, job.shard) == ("train", 3):
            raise KeyboardInterrupt
        return real_render(built, split, job, *args)

    def slow_sync(*args):
        calls.append(args)
        if len(calls) == 3:
            time.sleep(0.5)  # still syncing when the Ctrl-C comes
        real_sync(*args)

    monkeypatch.setattr(gen, "_render_rows", render)
    monkeypatch.setattr(gen, "sync_in_folder", slow_sync)
    out = tmp_path / "ds"
    with pytest.raises(KeyboardInterrupt):
        generate(spec_file, out, SERIAL)
    monkeypatch.undo()
    assert [p.name for p in committed(out)] == [f"part-{k:06d}.parquet" for k in range(3)]
    assert all(pq.read_metadata(p).num_rows == SIZE for p in committed(out))
    assert not list((out / lay.MANIFEST_DIR).rglob(".*.tmp-*"))
    resume_and_compare(spec_file, out, serial)


def test_a_killed_pool_worker_is_replaced_and_its_shard_redone(spec_file, serial, tmp_path):
    out = tmp_path / "ds"
    proc = start(spec_file, out)
    wait_for_commits(proc, out)
    children = Path(f"/proc/{proc.pid}/task/{proc.pid}/children")
    if not children.exists():
        proc.kill()
        pytest.skip("needs Linux /proc to find the worker processes")
    kids = [int(p) for p in children.read_text().split()]
    assert kids, "the driver has no worker processes"
    os.kill(kids[0], signal.SIGKILL)
    _stdout, stderr = proc.communicate(timeout=300)
    assert proc.returncode == 0, stderr
    a, b = tree(serial), tree(out)
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []


# ---- storage that refuses -----------------------------------------------------------------------


def run_cli(capsys, *args) -> tuple[int, str]:
    code = main([str(a) for a in args])
    return code, capsys.readouterr().err


def failing_replace(out: Path, exc: OSError, after: int):
    """os.replace that fails with `exc` once `after` renames into `out` have succeeded."""
    real = os.replace
    count = {"n": 0}

    def replace(src, dst, *args, **kwargs):
        if str(dst).startswith(str(out)) and not str(dst).endswith(lay.SPEC_FILE):
            if count["n"] >= after:
                raise type(exc)(exc.errno, exc.strerror, str(dst))
            count["n"] += 1
        return real(src, dst, *args, **kwargs)

    return replace


@pytest.mark.parametrize("workers", [1, 2])
def test_disk_full_is_one_line_exit_2_and_keeps_completed_shards(spec_file, serial, tmp_path, capsys,
                                                                 monkeypatch, workers):
    out = tmp_path / "ds"
    # (forked pool workers inherit the patch; each fails after its own 40 renames)
    monkeypatch.setattr(os, "replace", failing_replace(out, OSError(errno.ENOSPC, "No space left on device"), 40))
    code, err = run_cli(capsys, "generate", spec_file, "--out", out, "--shard-size", SIZE, "--workers", workers,
                        "--quiet")
    assert code == 2 and err.count("\n") == 1
    assert "disk full; completed shards are kept; free space and rerun with --resume" in err
    assert len(committed(out)) >= 1
    assert_commits_are_whole(out)
    assert not [p for p in out.rglob(".*.tmp-*")]  # nothing half-written left behind
    monkeypatch.undo()
    resume_and_compare(spec_file, out, serial)


def test_no_write_permission_is_one_line_exit_2(spec_file, serial, tmp_path, capsys, monkeypatch):
    """CI runs as root, which ignores file modes, so the refusal is simulated where it would
    surface: the rename that puts a written file in place."""
    out = tmp_path / "ds"
    monkeypatch.setattr(os, "replace", failing_replace(out, PermissionError(errno.EACCES, "Permission denied"), 12))
    code, err = run_cli(capsys, "generate", spec_file, "--out", out, "--shard-size", SIZE, "--quiet")
    assert code == 2 and err.count("\n") == 1 and "permission denied" in err and str(out) in err
    assert_commits_are_whole(out)
    monkeypatch.undo()
    resume_and_compare(spec_file, out, serial)


def test_read_only_file_system_is_one_line_exit_2(spec_file, tmp_path, capsys, monkeypatch):
    out = tmp_path / "ro" / "ds"
    real_mkdir = Path.mkdir

    def mkdir(self, *args, **kwargs):
        if str(self).startswith(str(tmp_path / "ro")):
            raise OSError(errno.EROFS, "Read-only file system", str(self))
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", mkdir)
    code, err = run_cli(capsys, "generate", spec_file, "--out", out, "--quiet")
    assert code == 2 and err.count("\n") == 1 and "Read-only file system" in err


def test_read_only_file_system_mid_run_is_one_line_exit_2(spec_file, tmp_path, capsys, monkeypatch):
    out = tmp_path / "ds"
    monkeypatch.setattr(os, "replace", failing_replace(out, OSError(errno.EROFS, "Read-only file system"), 7))
    code, err = run_cli(capsys, "generate", spec_file, "--out", out, "--shard-size", SIZE, "--quiet")
    assert code == 2 and err.count("\n") == 1 and "read-only file system" in err


def test_output_path_that_is_a_file_is_one_line_exit_2(spec_file, tmp_path, capsys):
    target = tmp_path / "taken"
    target.write_text("not a folder")
    code, err = run_cli(capsys, "generate", spec_file, "--out", target, "--quiet")
    assert code == 2 and err.count("\n") == 1 and "the output path is a file" in err and str(target) in err
    assert target.read_text() == "not a folder"


def test_output_inside_a_file_is_one_line_exit_2(spec_file, tmp_path, capsys):
    target = tmp_path / "taken"
    target.write_text("not a folder")
    code, err = run_cli(capsys, "generate", spec_file, "--out", target / "ds", "--quiet")
    assert code == 2 and err.count("\n") == 1 and "cannot create the output folder" in err


def test_existing_dataset_is_not_overwritten_without_overwrite(spec_file, serial, tmp_path, capsys):
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(serial, copy)
    code, err = run_cli(capsys, "generate", spec_file, "--out", copy, "--shard-size", SIZE, "--quiet")
    assert code == 2 and "--resume" in err and "--overwrite" in err
    assert tree(copy) == tree(serial)


@pytest.mark.parametrize("command, target, after", [
    ("generate", "augsplit.generate.generate", "; rerun with --resume to continue"),
    ("export", "augsplit.formats.export.export", "; run the same command again to finish the export"),
    ("verify", "augsplit.verify.verify", ""),  # verify and audit have no --resume to point to
    ("audit", "augsplit.cli._audit_input", ""),
])
def test_an_interrupted_command_says_only_what_it_can_do_next(command, target, after, spec_file, tmp_path,
                                                              monkeypatch, capsys):
    def ctrl_c(*_a, **_k):
        raise KeyboardInterrupt

    monkeypatch.setattr(target, ctrl_c)
    argv = {"generate": ["generate", str(spec_file), "--out", str(tmp_path / "ds"), "--quiet"],
            "export": ["export", str(tmp_path), "--to", "yolo", "--out", str(tmp_path / "y"), "--quiet"],
            "verify": ["verify", str(tmp_path), "--quiet"],
            "audit": ["audit", str(tmp_path), "--quiet"]}[command]
    assert main(argv) == 130
    assert capsys.readouterr().err.strip().splitlines() == [f"augsplit {command}: interrupted{after}"]


def test_a_ctrl_c_while_the_options_are_read_is_one_line_and_exit_130(monkeypatch, capsys):
    """Measured before: a Ctrl-C in the first 0.05 s of a command (argparse building its parser,
    where gettext looks for translations) ended it with a Python traceback and the signal's exit
    status (-2); the parser is now built inside the command's own Ctrl-C handling."""
    import augsplit.cli as cli

    def ctrl_c():
        raise KeyboardInterrupt

    monkeypatch.setattr(cli, "build_parser", ctrl_c)
    assert main(["plan", "demo"]) == 130
    assert capsys.readouterr().err.strip().splitlines() == ["augsplit: interrupted"]


def test_a_ctrl_c_while_the_command_line_loads_is_one_line_and_exit_130(monkeypatch, capsys):
    """Measured before: the `augsplit` script imported augsplit.cli before any Ctrl-C handling
    (about 13 ms), so a Ctrl-C then ended the command with a Python traceback. The script now
    runs `augsplit.__main__:run`, which imports the command line inside its own handling."""
    import tomllib

    import augsplit.__main__ as entry

    class CtrlCOnImport:
        def find_spec(self, name, path=None, target=None):
            if name == "augsplit.cli":
                raise KeyboardInterrupt
            return None

    monkeypatch.delitem(sys.modules, "augsplit.cli")
    monkeypatch.setattr(sys, "meta_path", [CtrlCOnImport(), *sys.meta_path])
    assert entry.run() == 130
    assert capsys.readouterr().err.strip().splitlines() == ["augsplit: interrupted"]
    scripts = tomllib.loads((Path(__file__).parents[1] / "pyproject.toml").read_text())["project"]["scripts"]
    assert scripts["augsplit"] == "augsplit.__main__:run"


def test_the_entry_point_runs_the_command_line(monkeypatch):
    import augsplit.__main__ as entry

    monkeypatch.setattr(sys, "argv", ["augsplit", "--version"])
    with pytest.raises(SystemExit) as stop:
        entry.run()
    assert stop.value.code == 0
