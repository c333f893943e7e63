"""augsplit.io, the one safe-write module: a temporary sibling, fsynced, renamed over a missing
path or a regular file only, then the folder fsynced; generation commits durably through it."""

from __future__ import annotations

import errno
import os
import stat
from pathlib import Path

import pytest
from specs import spec_dict

import augsplit.io as aio
from augsplit.dataset import layout as mf
from augsplit.build import open_mapping
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from augsplit.io import atomic_path, ensure_folder, write_bytes_atomic, write_files_atomic, write_output


@pytest.fixture
def events(monkeypatch):
    """Every temporary name handed out, file made create-only (O_EXCL), fsync (by the path its
    descriptor names), syncfs (by file system) and rename, in order."""
    log: list[tuple] = []
    real_fsync, real_replace, real_tmp, real_syncfs_fd = os.fsync, os.replace, aio.temporary_name, aio.syncfs_fd
    real_open, real_link = os.open, os.link

    def at(path, dir_fd):  # a name inside the folder open at dir_fd (Linux: /proc/self/fd names it)
        base = os.readlink(f"/proc/self/fd/{dir_fd}") if dir_fd is not None else ""
        return str(Path(base, path).resolve())

    def open_(path, flags, *a, dir_fd=None, **kw):
        fd = real_open(path, flags, *a, dir_fd=dir_fd, **kw)
        if flags & os.O_CREAT and flags & os.O_EXCL:
            log.append(("create", at(path, dir_fd)))
        return fd

    def fsync(fd):
        log.append(("fsync", os.readlink(f"/proc/self/fd/{fd}")))  # Linux: the open file's path
        return real_fsync(fd)

    def syncfs_fd(fd, where):
        done = real_syncfs_fd(fd, where)
        if done:
            log.append(("syncfs", os.fstat(fd).st_dev))
        return done

    def replace(src, dst, *, src_dir_fd=None, dst_dir_fd=None):
        log.append(("replace", at(src, src_dir_fd), at(dst, dst_dir_fd)))
        return real_replace(src, dst, src_dir_fd=src_dir_fd, dst_dir_fd=dst_dir_fd)

    def link(src, dst, **kw):  # a create-only commit (io.write_bytes_new): logged as a rename
        real_link(src, dst, **kw)
        log.append(("replace", str(Path(src).resolve()), str(Path(dst).resolve())))

    def temporary_name(path):
        tmp = real_tmp(path)
        log.append(("tmp", str(tmp.resolve())))
        return tmp

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "open", open_)
    monkeypatch.setattr(os, "replace", replace)
    monkeypatch.setattr(os, "link", link)
    monkeypatch.setattr(aio, "syncfs_fd", syncfs_fd)  # what syncfs(path) calls too
    monkeypatch.setattr(aio, "temporary_name", temporary_name)
    return log


def assert_committed(log, final: Path) -> None:
    """`final` was renamed (or hard-linked) into place from a temporary sibling whose data had been synced
    (its own fsync, or a syncfs of its file system after it was made), and its folder was
    fsynced after the rename (POSIX: a rename is durable once its folder is synced)."""
    final = final.resolve()
    i = next(k for k, e in enumerate(log) if e[0] == "replace" and e[2] == str(final))
    tmp = log[i][1]
    assert Path(tmp).parent == final.parent and Path(tmp).name.startswith(f".{final.name}.tmp-")
    made = log.index(("tmp", tmp))
    synced = [e for e in log[made:i] if e == ("fsync", tmp) or e == ("syncfs", os.stat(final).st_dev)]
    assert synced, f"{final.name} renamed before its data was synced"
    assert ("fsync", str(final.parent)) in log[i + 1:], f"{final.parent} not synced after the rename"


def assert_durable_before_part(log, image: Path, part: Path) -> None:
    """An image file made whole at its name (created there, or renamed from a temporary
    sibling), then its data synced (its own fsync or a syncfs of its file system) and its
    folder fsynced, all before its shard's part commits (a serial run commits a shard while it
    writes the next one's images, so other parts may commit in between). POSIX: fsync of the
    file and of its folder make the data and the name durable."""
    image = image.resolve()
    i = next(k for k, e in enumerate(log) if e == ("create", str(image)) or (e[0] == "replace" and e[2] == str(image)))
    made = i
    if log[i][0] == "replace":
        tmp = log[i][1]
        assert Path(tmp).name.startswith(f".{image.name}.tmp-")
        made = log.index(("tmp", tmp))
    commit = next(k for k, e in enumerate(log) if e[0] == "replace" and e[2] == str(part.resolve()))
    assert commit > i, f"{image.name}'s shard committed before the image was made"
    synced = {("fsync", log[i][1]), ("fsync", str(image)), ("syncfs", os.stat(image).st_dev)}
    assert synced & set(log[made:commit]), f"{image.name}'s shard committed before the image was synced"
    assert ("fsync", str(image.parent)) in log[i + 1:commit], f"{image.parent} not synced before the part commits"


def test_generation_commits_durably(tmp_path, events):
    """Measured on main: nothing called fsync, so a power loss could leave a renamed but empty part."""
    import pyarrow.parquet as pq

    out = tmp_path / "ds"
    generate(None, out, Options(progress=False, store="files", shard_size=10), built=open_mapping(spec_dict()))
    parts = sorted((out / mf.MANIFEST_DIR).rglob("part-*.parquet"))
    images = sorted((out / mf.IMAGES_DIR).rglob("*.png"))
    assert len(parts) > 1 and images
    for f in [out / mf.SPEC_FILE, out / mf.SUMMARY_FILE, *parts]:
        assert_committed(events, f)
    own = {(out / rel).resolve(): part for part in parts for rel in pq.read_table(part).column("file").to_pylist()}
    assert sorted(own) == [f.resolve() for f in images]
    for f in images:
        assert_durable_before_part(events, f, own[f.resolve()])


@pytest.mark.parametrize("workers", [1, 2])
def test_a_shards_part_commits_after_its_archive_and_distractor_part_are_in_place(tmp_path, events, workers):
    """A shard's manifest part is its commit, so its tar and its distractor part are renamed
    into place and their folders fsynced before it is renamed: serially, and when the driver
    commits what pool workers wrote (a crash can never leave a committed shard without them)."""
    out = tmp_path / "ds"
    distractors = {"alpha_threshold": 0.5, "distractors": {"count": [1, 2]}}
    generate(None, out, Options(progress=False, store="tar", shard_size=3, workers=workers),
             built=open_mapping(spec_dict(render=distractors)))
    parts = sorted((out / mf.MANIFEST_DIR).rglob("part-*.parquet"))
    assert len(parts) > 2
    for part in parts:
        split = part.parent
        rest = [out / mf.SHARDS_DIR / split.name / part.with_suffix(".tar").name,
                out / mf.DISTRACTOR_DIR / split.name / part.name]
        commit = next(k for k, e in enumerate(events) if e[0] == "replace" and e[2] == str(part.resolve()))
        for f in rest:
            assert f.is_file(), f
            moved = next(k for k, e in enumerate(events) if e[0] == "replace" and e[2] == str(f.resolve()))
            assert moved < commit, f"{part} committed before {f.name} was in place"
            assert ("fsync", str(f.parent.resolve())) in events[moved + 1:commit], f"{f.parent} not synced in time"


def test_a_shard_of_files_is_synced_once_not_per_batch(tmp_path, events):
    """Measured before: one syncfs per batch of 16 image files (32 per shard of 500); now one
    per shard, still before the shard's part commits."""
    if not aio.syncfs(tmp_path):
        pytest.skip("no syncfs here")
    events.clear()
    out = tmp_path / "ds"
    many = {"train": {"region": {"x": [0, 20]}, "count": 80}, "test": {"region": {"x": [44, 64]}, "count": 40}}
    generate(None, out, Options(progress=False, store="files", shard_size=40),
             built=open_mapping(spec_dict(splits=many)))
    parts = sorted((out / mf.MANIFEST_DIR).rglob("part-*.parquet"))
    syncfs = [e for e in events if e[0] == "syncfs"]
    assert len(syncfs) == len(parts)
    # the summary (the dataset's "complete" mark) comes after every part is durable
    last_part = max(k for k, e in enumerate(events) if e[0] == "replace" and e[2] in {str(p.resolve()) for p in parts})
    summary = next(k for k, e in enumerate(events) if e[0] == "replace" and e[2].endswith(mf.SUMMARY_FILE))
    assert last_part < summary


def test_a_fresh_shard_makes_each_image_once_at_its_name(tmp_path, events):
    """Measured before: each image went to a temporary name, was checked twice and renamed (a
    third of `--store files`' cost per image on tmpfs). A shard's part is its commit, so a
    fresh shard creates each image at its final name, create-only, and syncs them together."""
    out = tmp_path / "ds"
    generate(None, out, Options(progress=False, store="files", shard_size=10), built=open_mapping(spec_dict()))
    images = {str(p.resolve()) for p in (out / mf.IMAGES_DIR).rglob("*.png")}
    assert images and images == {e[1] for e in events if e[0] == "create" and e[1] in images}
    assert not [e for e in events if e[0] == "replace" and e[2] in images]
    assert not [e for e in events if e[0] == "tmp" and Path(e[1]).parent.parent.name == mf.IMAGES_DIR]


def test_an_image_already_at_its_name_is_replaced_whole_and_a_link_never_followed(tmp_path, events):
    """A resumed shard finds its earlier attempt's images (maybe half-written): each is replaced
    through a temporary, as before; a symbolic link there is refused, its target untouched."""
    folder = tmp_path / "images"
    folder.mkdir()
    (folder / "a.png").write_bytes(b"half")
    assert not aio.write_new_file(str(folder / "a.png"), b"whole")  # nothing written: it is there
    assert (folder / "a.png").read_bytes() == b"half"
    assert aio.write_new_file(str(folder / "b.png"), b"new") and (folder / "b.png").read_bytes() == b"new"
    (tmp_path / "theirs").write_bytes(b"theirs")
    (folder / "c.png").symlink_to(tmp_path / "theirs")
    assert not aio.write_new_file(str(folder / "c.png"), b"new")
    assert (tmp_path / "theirs").read_bytes() == b"theirs"


def test_a_failed_create_only_write_leaves_nothing(tmp_path, monkeypatch):
    def full(fd, data):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "write", full)
    with pytest.raises(OSError):
        aio.write_new_file(str(tmp_path / "a.png"), b"data")
    assert os.listdir(tmp_path) == []


def test_atomic_path_syncs_what_a_writer_left_at_the_temporary(tmp_path, events):
    target = tmp_path / "t.parquet"
    with atomic_path(target) as tmp:
        tmp.write_bytes(b"rows")  # e.g. a Parquet writer given the temporary path
    assert target.read_bytes() == b"rows"
    assert_committed(events, target)


def test_a_batch_of_files_is_synced_once_and_committed_each(tmp_path, events):
    items = [(tmp_path / f"{i}.png", bytes([i]) * 10) for i in range(5)]
    write_files_atomic(items)
    assert all(p.read_bytes() == data for p, data in items)
    for p, _ in items:
        assert_committed(events, p)
    syncs = [e for e in events if e[0] in ("fsync", "syncfs") and e[1] != str(tmp_path.resolve())]
    assert len(syncs) in (1, len(items))  # one syncfs on Linux, else one fsync per file


def test_a_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "keep.csv"
    target.write_bytes(b"old")
    with pytest.raises(RuntimeError):
        with atomic_path(target) as tmp:
            tmp.write_bytes(b"half")
            raise RuntimeError("writer died")
    assert target.read_bytes() == b"old" and os.listdir(tmp_path) == ["keep.csv"]


def _special(kind: str, p: Path, elsewhere: Path):
    if kind == "symlink":
        elsewhere.write_bytes(b"theirs")
        p.symlink_to(elsewhere)
    elif kind == "dangling symlink":
        p.symlink_to(elsewhere)
    elif kind == "fifo":
        os.mkfifo(p)
    elif kind == "folder":
        p.mkdir()
    elif kind == "device":
        try:
            os.mknod(p, stat.S_IFCHR | 0o666, os.makedev(1, 3))  # a null device of our own
        except OSError:
            pytest.skip("cannot make a device node here")


@pytest.mark.parametrize("kind", ["symlink", "dangling symlink", "fifo", "folder", "device"])
def test_only_a_missing_path_or_a_regular_file_is_written(kind, tmp_path):
    p, elsewhere = tmp_path / "out", tmp_path / "elsewhere"
    _special(kind, p, elsewhere)
    before = os.lstat(p)
    with pytest.raises(DatasetError) as e:
        write_bytes_atomic(p, b"new")
    assert str(e.value).startswith(str(p)) and "\n" not in str(e.value)
    after = os.lstat(p)
    assert (after.st_mode, after.st_ino) == (before.st_mode, before.st_ino)
    if kind == "symlink":
        assert elsewhere.read_bytes() == b"theirs"
    if kind == "dangling symlink":
        assert not elsewhere.exists()  # never created through the link
    assert not [n for n in os.listdir(tmp_path) if ".tmp-" in n]


def test_write_output_dash_is_stdout(tmp_path, monkeypatch, capsysbinary):
    monkeypatch.chdir(tmp_path)
    assert write_output("-", b"{}\n") == "-"
    assert capsysbinary.readouterr().out == b"{}\n" and os.listdir(tmp_path) == []


def test_ensure_folder(tmp_path):
    assert ensure_folder(tmp_path / "new").is_dir()
    assert ensure_folder(tmp_path / "new") == tmp_path / "new"  # an existing folder is fine
    (tmp_path / "f").write_bytes(b"x")
    (tmp_path / "link").symlink_to(tmp_path / "new")
    for bad, words in ((tmp_path / "f", "not a folder"), (tmp_path / "link", "symbolic link"),
                       (tmp_path / "no" / "deeper", "no such folder"), ("-", "not '-'")):
        with pytest.raises(DatasetError, match=words) as e:
            ensure_folder(bad)
        assert "\n" not in str(e.value)
    assert not (tmp_path / "no").exists() and (tmp_path / "f").read_bytes() == b"x"


def test_write_bytes_new_never_replaces_and_of_racing_writers_exactly_one_wins(tmp_path):
    """Create-only and whole: the first writer's bytes stay; a later one gets False and changes
    nothing; eight threads racing for one name: one True, the file holds exactly its bytes, and
    no temporary is left."""
    import threading

    target = tmp_path / "spec.json"
    assert aio.write_bytes_new(target, b"first") is True
    assert aio.write_bytes_new(target, b"second") is False and target.read_bytes() == b"first"
    race = tmp_path / "race.json"
    won, start = [], threading.Barrier(8)

    def writer(k):
        start.wait()
        if aio.write_bytes_new(race, f"writer {k} ".encode() * 1000):
            won.append(k)

    threads = [threading.Thread(target=writer, args=(k,)) for k in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(won) == 1 and race.read_bytes() == f"writer {won[0]} ".encode() * 1000
    assert sorted(p.name for p in tmp_path.iterdir()) == ["race.json", "spec.json"]


def test_write_bytes_new_leaves_a_link_or_folder_at_the_name_alone(tmp_path):
    outside = tmp_path / "outside.txt"
    outside.write_bytes(b"not ours")
    link = tmp_path / "link.json"
    link.symlink_to(outside)
    with pytest.raises(DatasetError):
        aio.write_bytes_new(link, b"x")
    (tmp_path / "dir.json").mkdir()
    with pytest.raises(DatasetError):
        aio.write_bytes_new(tmp_path / "dir.json", b"x")
    assert outside.read_bytes() == b"not ours" and link.is_symlink()


def test_write_bytes_new_without_hard_links_still_never_replaces(tmp_path, monkeypatch):
    """The fallback where the file system refuses hard links (EPERM, as some FUSE and network
    file systems do): the file is made create-only, whole, and a second writer gets False."""
    import errno

    def no_links(src, dst, **kw):
        raise OSError(errno.EPERM, "Operation not permitted")

    monkeypatch.setattr(os, "link", no_links)
    target = tmp_path / "spec.json"
    assert aio.write_bytes_new(target, b"first") is True
    assert aio.write_bytes_new(target, b"second") is False
    assert target.read_bytes() == b"first" and [p.name for p in tmp_path.iterdir()] == ["spec.json"]


def test_a_folder_lock_is_one_line_when_held_and_nothing_where_there_are_no_locks(tmp_path, monkeypatch):
    import errno
    import fcntl

    from augsplit.dataset.create import FolderLock
    from augsplit.io import lock_folder

    held = FolderLock(tmp_path)
    held.take()
    fd = os.open(tmp_path, os.O_RDONLY)
    try:
        with pytest.raises(DatasetError, match="busy here"):
            lock_folder(fd, tmp_path, "busy here")
    finally:
        os.close(fd)
        held.release()

    def no_locks(fd, how):  # a file system without flock (some network file systems)
        raise OSError(errno.ENOLCK, "no locks")

    monkeypatch.setattr(fcntl, "flock", no_locks)
    lock = FolderLock(tmp_path)
    lock.take()  # not refused: runs are then not kept apart, as documented
    first = lock.fd
    lock.take()  # taken once: no second descriptor
    assert lock.fd == first and os.fstat(first)
    lock.release()
    assert lock.fd is None
    with pytest.raises(OSError):
        os.fstat(first)  # the descriptor was closed, not leaked


def test_replace_file_at_removes_only_a_temporary_it_made(tmp_path, monkeypatch):
    """A temporary name already taken (by anything) is left alone: found by a review, the
    file holding it was removed on the way out."""
    (tmp_path / "a.png").write_bytes(b"old")
    (tmp_path / ".taken").write_bytes(b"someone else's")
    monkeypatch.setattr(aio, "temporary_name", lambda path: Path(path).with_name(".taken"))
    fd = aio.open_folder(tmp_path)
    try:
        with pytest.raises(FileExistsError):
            aio.replace_file_at(fd, "a.png", b"new", str(tmp_path / "a.png"))
    finally:
        os.close(fd)
    assert (tmp_path / ".taken").read_bytes() == b"someone else's"
    assert (tmp_path / "a.png").read_bytes() == b"old"


@pytest.mark.parametrize("code, raised", [(errno.EINVAL, False), (errno.ENOTSUP, False), (errno.EIO, True)])
def test_a_synced_replace_treats_the_folder_fsync_as_every_atomic_write_does(tmp_path, monkeypatch, code, raised):
    """replace_file_at(sync=True) fsyncs its folder through _fsync_folder_fd, as atomic_path
    does: a file system that cannot sync a folder (EINVAL, ENOTSUP) is left as it is, a storage
    error there is raised, not passed over. The file is in place in every case."""
    (tmp_path / "a.json").write_bytes(b"old")
    fd = aio.open_folder(tmp_path)
    real_fsync = os.fsync

    def fsync(f):
        if f == fd:
            raise OSError(code, os.strerror(code))
        real_fsync(f)

    monkeypatch.setattr(aio.os, "fsync", fsync)
    try:
        if raised:
            with pytest.raises(OSError) as info:
                aio.replace_file_at(fd, "a.json", b"new", str(tmp_path / "a.json"), sync=True)
            assert info.value.errno == code
        else:
            aio.replace_file_at(fd, "a.json", b"new", str(tmp_path / "a.json"), sync=True)
    finally:
        os.close(fd)
    assert (tmp_path / "a.json").read_bytes() == b"new"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.json"]
