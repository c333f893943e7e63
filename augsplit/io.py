"""Safe writing, the one way augsplit puts a file on disk: a temporary name in the same folder,
flushed and fsynced, renamed over a missing path or a regular file only (never a symlink,
FIFO, device or folder), then the folder fsynced. Files that a later commit makes valid (a
generated shard's images, committed by its manifest part) are instead made create-only at
their final names and synced together before that commit (`write_new_file`, `sync_in_folder`).
Also `-` as stdout, report folders, and plain JSON values."""

from __future__ import annotations

import ctypes
import errno
import functools
import math
import os
import secrets
import stat
import sys
from contextlib import contextmanager, suppress
from pathlib import Path

from .errors import DatasetError

STDOUT = "-"  # an --out of "-" means standard output

# errno values that mean "the storage cannot take more", whatever the file
DISK_FULL = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC), errno.EFBIG}
_KINDS = ((stat.S_ISLNK, "a symbolic link"), (stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a FIFO"),
          (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))


def is_stdout(path) -> bool:
    return isinstance(path, str) and path == STDOUT


def _kind(mode: int) -> str:
    return next((name for test, name in _KINDS if test(mode)), "not a regular file")


def _mode(p: Path, dir_fd: int | None = None, where: str | None = None) -> int | None:
    """What is at `p` itself (a link is not followed), or None when nothing is (the write
    that follows then says why it cannot be made, e.g. a missing folder)."""
    try:
        return os.lstat(p, dir_fd=dir_fd).st_mode
    except (FileNotFoundError, NotADirectoryError):
        return None
    except OSError as exc:
        raise os_error(exc, where or p) from None


def check_target(path: str | Path, *, dir_fd: int | None = None, where: str | None = None) -> Path:
    """`path` as a Path, if a write may land there: it is missing or a regular file. With
    `dir_fd`, `path` is a name in the folder open there and `where` names it in messages.

    Raises DatasetError naming the path when it is a symlink, FIFO, device, socket or folder
    (the link itself is judged, not what it points to)."""
    p = Path(path)
    mode = _mode(p, dir_fd, where)
    if mode is not None and not stat.S_ISREG(mode):
        raise DatasetError(f"is {_kind(mode)}; augsplit writes only to a new path or over a regular file",
                           where=where or str(p))
    return p


def refuse_input(out: str | Path, source: str | Path) -> None:
    """Refuse (one line) an output that would replace the input `source` (the same file, by
    any name) or land inside it when it is a folder."""
    if is_stdout(out) or not os.path.lexists(source):
        return
    o, s = Path(out), Path(source)
    if os.path.lexists(o) and os.path.samefile(o, s):
        raise DatasetError("is the input table; augsplit never replaces its input, give another --out", where=str(o))
    if s.is_dir() and o.resolve().is_relative_to(s.resolve()):
        raise DatasetError(f"lies inside the input folder {s}; a new file there would join the table", where=str(o))


def fsync_folder(path: str | Path) -> None:
    """Make the folder's entries (a rename, a new file) durable. File systems that cannot
    sync a folder (EINVAL) are left as they are."""
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    try:
        _fsync_folder_fd(fd)
    finally:
        os.close(fd)


def _fsync_folder_fd(fd: int) -> None:
    """fsync of the folder open at `fd`, where its file system can sync a folder."""
    try:
        os.fsync(fd)
    except OSError as exc:
        if exc.errno not in (errno.EINVAL, errno.ENOTSUP):
            raise


def _fsync_file(path: Path, dir_fd: int | None = None) -> None:
    """fsync of the regular file at `path` (a name in the folder open at `dir_fd`, if given);
    never through a link, and never waiting on a FIFO put there."""
    fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0), dir_fd=dir_fd)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@functools.lru_cache(maxsize=1)
def _libc_syncfs():
    """Linux's syncfs(2), or None where the C library has none."""
    try:
        fn = ctypes.CDLL(None, use_errno=True).syncfs
    except (OSError, AttributeError):
        return None
    fn.argtypes = [ctypes.c_int]
    return fn


def syncfs(path: Path) -> bool:
    """Flush the whole file system holding `path` in one call (Linux syncfs, which waits for
    the writes); False where there is no such call."""
    if _libc_syncfs() is None:
        return False
    fd = os.open(path, os.O_RDONLY)
    try:
        return syncfs_fd(fd, str(path))
    finally:
        os.close(fd)


def syncfs_fd(fd: int, where: str) -> bool:
    """`syncfs` of the file system holding the file open at `fd`."""
    fn = _libc_syncfs()
    if fn is None:
        return False
    if fn(fd) != 0:
        err = ctypes.get_errno()
        raise OSError(err, os.strerror(err), where)
    return True


def folder_identity(fd: int) -> tuple[int, int]:
    """(device, inode) of the folder open at `fd`: which folder it is, whatever its name."""
    st = os.fstat(fd)
    return st.st_dev, st.st_ino


def sync_in_folder(folder: str, identity: tuple[int, int], names) -> None:
    """Make the files `names`, written unsynced in the folder whose `folder_identity` was
    `identity`, durable with their names: one syncfs of its file system (an fsync per file
    where there is none), then the folder fsynced, all through the folder opened again at
    `folder` and found to be that same folder. Refused in one line, nothing synced, if it is
    not (a folder on the way replaced or linked elsewhere since): nothing outside is opened."""
    gone = DatasetError("is no longer the folder these files were written in (moved, or a folder on its way "
                        "linked elsewhere); they were not committed", where=folder)
    try:
        fd = open_folder(folder)
    except OSError as exc:
        if isinstance(exc, (FileNotFoundError, NotADirectoryError)) or exc.errno == errno.ELOOP:
            raise gone from None  # a link now holds its name, or nothing does
        raise
    try:
        if folder_identity(fd) != identity:
            raise gone
        if not syncfs_fd(fd, folder):
            for name in names:
                _fsync_file(name, fd)
        _fsync_folder_fd(fd)
    finally:
        os.close(fd)


def _sync_data(paths: list) -> None:
    """Make the files' bytes durable: one syncfs per file system of their folders for a batch
    (one stat per folder, not per file), an fsync each for a single file or where syncfs is
    missing (one journal commit per call is the cost)."""
    if len(paths) > 1:
        devices = {os.stat(f).st_dev: f for f in _folders(paths)}
        if all(syncfs(Path(f)) for f in devices.values()):
            return
    for p in paths:
        _fsync_file(p)


def temporary_name(path: Path) -> Path:
    """The temporary sibling a write goes to first: hidden, and matching `.*.tmp-*`."""
    return path.with_name(f".{path.name}.tmp-{os.getpid()}-{secrets.token_hex(3)}")


def new_temporary(final: str | Path) -> Path:
    """A temporary name next to `final` for a file the caller writes now and puts in place
    later (`move_into_place`); refused, as `atomic_path` refuses, where a write may not land."""
    return temporary_name(check_target(final))


@contextmanager
def atomic_path(path: str | Path):
    """Yield a temporary path next to `path` for the caller to write and close; on success
    fsync it, rename it over `path` and fsync the folder. On failure the temporary goes.

    Refuses (DatasetError) a target that is not missing or a regular file. OSErrors of the
    storage propagate unchanged (see `os_error` for a one-line version)."""
    p, tmp = Path(path), new_temporary(path)
    try:
        yield tmp
        move_into_place([(tmp, p)])
    finally:
        if os.path.lexists(tmp):
            tmp.unlink()


def move_into_place(moves) -> None:
    """Put files written whole under temporary names (`temporary_name`) in place, in the given
    order, each with `atomic_path`'s promise: fsynced, checked, renamed over its target, its
    folder fsynced. A file is in place, durably, before the next one moves, so the last one
    can be a commit that says the others are there."""
    for tmp, final in moves:
        _sync_data([tmp])
        check_target(final)  # again: something may have appeared there while it was written
        os.replace(tmp, final)
        fsync_folder(Path(final).parent)


def write_files_atomic(items) -> None:
    """Write several `(path, bytes)` files with `atomic_path`'s promise for each, syncing them
    together: every file to a temporary sibling, all made durable at once, then each renamed
    into place and each folder fsynced once. On failure no temporary is left."""
    items = [(check_target(p), data) for p, data in items]
    tmps: list[Path] = []
    try:
        for p, data in items:
            tmp = temporary_name(p)
            with open(tmp, "xb") as f:  # a name already taken is not ours: kept, never removed
                tmps.append(tmp)
                f.write(data)
        _sync_data(tmps)
        for (p, _), tmp in zip(items, tmps):
            check_target(p)
            os.replace(tmp, p)
        _sync_folders(p for p, _ in items)
    finally:
        for tmp in tmps:
            if os.path.lexists(tmp):
                tmp.unlink()


_CREATE_ONLY = os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0)


def write_new_file(path: str, data, dir_fd: int | None = None, *, sync: bool = False) -> bool:
    """Write `data` into a file made at `path` now, or return False, writing nothing, when
    anything is already there (create-only, O_EXCL: never over or through an existing file,
    link or folder). One open, write and close: no temporary, no rename, no sync unless
    `sync` (then the file is fsynced before it is closed). With `dir_fd`, `path` is a name
    inside the folder open there (`open_folder`).

    Until it is closed the file is partial at its final name, so this is only for files that
    nothing takes as valid before the caller commits them after a `sync_in_folder` (generation:
    a shard's images, committed by the shard's manifest part; a resumed run writes the images
    of a shard without a part again). A failed write removes the file it made."""
    try:
        fd = os.open(path, _CREATE_ONLY, 0o666, dir_fd=dir_fd)
    except FileExistsError:
        return False
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view):]
        if sync:
            os.fsync(fd)
    except BaseException:
        with suppress(OSError):
            if os.lstat(path, dir_fd=dir_fd).st_ino == os.fstat(fd).st_ino:  # still the file made here
                os.unlink(path, dir_fd=dir_fd)
        os.close(fd)
        raise
    os.close(fd)
    return True


def replace_file_at(dir_fd: int, name: str, data, where: str, *, sync: bool = False) -> None:
    """Put `data` at `name` in the folder open at `dir_fd`, over what is there if that is a
    regular file (refused, naming `where`, if it is anything else, checked again just before
    the rename): written whole under a temporary name in the same folder, then renamed over
    it. With `sync`, the temporary is synced before the rename and the folder after it (see
    atomic_path); without, the caller syncs later (`sync_in_folder`), as for `write_new_file`.
    Only a temporary this call made is ever removed."""
    check_target(name, dir_fd=dir_fd, where=where)
    tmp = temporary_name(Path(where)).name
    if not write_new_file(tmp, data, dir_fd, sync=sync):  # the name is taken: not ours, kept
        raise FileExistsError(errno.EEXIST, "a temporary name is taken", os.path.join(os.path.dirname(where), tmp))
    try:
        check_target(name, dir_fd=dir_fd, where=where)
        os.replace(tmp, name, src_dir_fd=dir_fd, dst_dir_fd=dir_fd)
    except BaseException:
        with suppress(OSError):
            os.unlink(tmp, dir_fd=dir_fd)
        raise
    if sync:
        _fsync_folder_fd(dir_fd)


def open_folder(folder: str | Path) -> int:
    """A descriptor of the folder at `folder`, for writing the files inside it by name
    (`write_new_file(name, data, fd)`), so that they land in this folder whatever happens to
    the names on the way to it later (a folder swapped for a symbolic link, say). Its last name
    may not be a link (O_NOFOLLOW); the caller has checked the rest of the way and closes it."""
    return os.open(folder, os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0))


def _folders(paths) -> list[str]:
    """The folders of some file paths, each once, in order (string operations: a Path per file
    cost a shard of 500 images 2.9 ms)."""
    return list(dict.fromkeys(os.path.dirname(os.fspath(p)) or "." for p in paths))


def _sync_folders(paths) -> None:
    for folder in _folders(paths):
        fsync_folder(folder)


def write_bytes_new(path: str | Path, data: bytes) -> bool:
    """Write `data` to `path` only if nothing is there, whole: written and synced under a
    temporary name, then hard-linked into place, which never replaces anything (a reader sees
    the whole file or none, and of two writers racing for the name exactly one wins). False,
    leaving what is there untouched, if something already was. Where the file system has no
    hard links, the file is made create-only (O_EXCL) and synced: still never a replacement."""
    p = check_target(path)
    tmp = temporary_name(p)
    f = open(tmp, "xb")  # a name already taken is not ours: kept, never removed
    try:
        with f:
            f.write(data)
        _sync_data([tmp])
        try:
            os.link(tmp, p)
        except FileExistsError:
            return False
        except OSError as exc:
            if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV, errno.EMLINK):
                raise
            if not write_new_file(str(p), data):
                return False
            _sync_data([p])
        fsync_folder(p.parent)
        return True
    finally:
        if os.path.lexists(tmp):
            tmp.unlink()


def write_bytes_atomic(path: str | Path, data: bytes) -> None:
    write_files_atomic([(path, data)])


def write_text_atomic(path: str | Path, text: str) -> None:
    write_bytes_atomic(path, text.encode("utf-8"))


def os_error(exc: OSError, path: str | Path) -> DatasetError:
    """An OSError met while writing `path` -> one line naming the place and the reason."""
    p = Path(path)
    place = str(p)
    if not p.parent.is_dir():  # whatever the library said about it
        reason = "no such folder" if not os.path.lexists(p.parent) else "a part of the path is not a folder"
        place = str(p.parent)
    elif exc.errno in DISK_FULL:
        reason = "disk full"
    elif exc.errno == errno.EROFS:
        reason = "read-only file system"
    elif isinstance(exc, PermissionError):
        reason = "permission denied"
    elif exc.errno == errno.EISDIR:
        reason = "is a folder"
    else:
        reason = exc.strerror or str(exc)
    return DatasetError(f"cannot write: {reason}", where=place)


@contextmanager
def output_path(path: str | Path):
    """`atomic_path` for a file a command writes: every refusal or storage error is one line."""
    try:
        with atomic_path(path) as tmp:
            yield tmp
    except OSError as exc:
        raise os_error(exc, path) from None


def write_output(path: str | Path, data: bytes | str) -> str | Path:
    """Write one document: to standard output for `-`, else safely to `path`. Returns where."""
    raw = data.encode("utf-8") if isinstance(data, str) else data
    if is_stdout(path):
        sys.stdout.flush()
        sys.stdout.buffer.write(raw)
        sys.stdout.buffer.flush()
        return STDOUT
    with output_path(path) as tmp:
        with open(tmp, "xb") as f:
            f.write(raw)
    return Path(path)


def lock_folder(fd: int, where, busy: str, *, shared: bool = False) -> None:
    """Lock the folder open as `fd` for as long as `fd` stays open (`flock` on the folder
    itself, so nothing is added to it): exclusive, or `shared` with other shared holders. Held
    elsewhere: one-line DatasetError `busy` naming `where`. Where the file system has no such
    locks, nothing is locked."""
    import fcntl  # POSIX only: imported where a run locks a folder

    try:
        fcntl.flock(fd, (fcntl.LOCK_SH if shared else fcntl.LOCK_EX) | fcntl.LOCK_NB)
    except BlockingIOError:
        raise DatasetError(busy, where=str(where)) from None
    except OSError:  # no locks on this file system
        pass


def check_folder_target(path: str | Path) -> Path:
    """`path` as a Path, if it may be used as an output folder: missing, or a real folder
    (not a symlink). Refuses `-` and anything else in one line. Creates nothing."""
    if is_stdout(path):
        raise DatasetError("this command writes several files: give a folder, not '-'", where=STDOUT)
    if not str(path).strip():  # Path("") is the working directory
        raise DatasetError("the output folder's name is empty", where="--out ''")
    p = Path(path)
    mode = _mode(p)
    if mode is None:
        return p
    if stat.S_ISLNK(mode):
        raise DatasetError(f"is a symbolic link (to {os.readlink(p)}); give the folder itself", where=str(p))
    if not stat.S_ISDIR(mode):
        raise DatasetError(f"the output path is {'a file' if stat.S_ISREG(mode) else _kind(mode)}, not a folder",
                           where=str(p))
    return p


def ensure_folder(path: str | Path) -> Path:
    """An output folder ready for writing: `path` if it is a real folder we may write in, or
    made (its parent must exist). One-line DatasetError for `-`, a file, a symlink, a missing
    parent, a read-only file system or a permission refused."""
    p = check_folder_target(path)
    if not os.path.lexists(p):
        try:
            os.mkdir(p)
            fsync_folder(p.parent)
        except FileExistsError:
            return ensure_folder(p)  # made by someone else a moment ago: judge it again
        except OSError as exc:
            raise os_error(exc, p) from None
    elif not os.access(p, os.W_OK | os.X_OK):
        read_only = os.statvfs(p).f_flag & os.ST_RDONLY
        raise DatasetError(f"cannot write: {'read-only file system' if read_only else 'permission denied'}",
                           where=str(p))
    return p


def plain(v):
    """Numbers, arrays, numpy scalars and containers -> JSON values (NaN, inf and NA -> None)."""
    import numpy as np
    import pandas as pd

    if isinstance(v, dict):
        return {str(k): plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [plain(x) for x in v]
    if isinstance(v, np.ndarray):
        return [plain(x) for x in v.tolist()]
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, (float, np.floating)):
        f = float(v)
        return f if math.isfinite(f) else None
    if v is None or isinstance(v, (int, str)):
        return v
    if v is pd.NA or v is pd.NaT:
        return None
    return str(v)
