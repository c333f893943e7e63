"""The folders audit, score and preview write their reports to, and what augsplit may replace
and remove there.

A report folder is either one of a dataset's own report folders (`<dataset>/audit`, `score`,
`preview`: augsplit's, like the rest of the dataset) or a folder outside every dataset. In the
second, a report file replaces only a file augsplit wrote there before, as the folder's hidden
list (REPORTS_LIST) records; a file of the same name that the user made, or that is one of the
command's own inputs, is refused by name and left as it is. Anywhere else inside a dataset (its
images, its manifest) a report would become a stray file the dataset's checks refuse.

A folder holds one run's report per command: when a run has written all its files
(`report_set`), the files the same command wrote there before and this run did not (score's
comparison tables after a score of one model, the contact sheets of another dataset's splits)
are removed, so no table of an earlier run stands beside the new ones as if it were theirs.
The list stamps each file a completed run wrote (its size and SHA-256), and a file goes
only while it is still that file: never one the user saved under the name since, a
command's input, a link, a folder. A stamped file that changed is not replaced either: it is
refused by name, like a user's file. A run that fails records only the files it did write.

Once checked, the folder is opened once and locked for the run: its files are written, its
list read and written and stale reports removed in that folder, never through a link swapped
in for it mid-run; a second run writing reports in the same folder at the same time is
refused in one line rather than racing the first for the list.
"""

from __future__ import annotations

import hashlib
import json
import os
import stat
from contextlib import contextmanager, suppress
from dataclasses import dataclass, field
from pathlib import Path

from .dataset import layout as lay
from .errors import DatasetError
from .io import check_folder_target, ensure_folder, lock_folder, open_folder, os_error, replace_file_at

# {"files": [names augsplit wrote in this folder], "runs": {command: [names its last run may have left]},
#  "stamps": {name: [size, SHA-256] of the file a completed run wrote}}
REPORTS_LIST = ".augsplit-reports.json"
COMMANDS = ("score", "audit", "preview")  # the commands that write reports


def dataset_root(path) -> Path | None:
    """The dataset folder `path` is, or lies in (spec.json or manifest parts), else None."""
    p = Path(os.path.realpath(path))
    for d in (p, *p.parents):
        if lay.is_dataset(d):
            return d
    return None


def check_report_folder(out, names, inputs=()) -> Path:
    """`out` as a Path, if the report files `names` may be written there (see the module
    docstring): one-line DatasetError naming the path if not; creates nothing. `inputs` are
    the command's input files and folders."""
    p = check_folder_target(out)
    root = dataset_root(p if p.exists() else p.absolute().parent)
    own = root is not None and Path(os.path.realpath(p.absolute().parent)) == root and p.name in lay.REPORT_DIRS
    if root is not None and not own:
        raise DatasetError(f"lies inside the dataset folder {root}, where a report would become a stray file; "
                           f"give a folder outside it (or its own {', '.join(lay.REPORT_DIRS)} folder)", where=str(p))
    for src in inputs:  # a report inside an input folder would be read as part of it next time
        if os.path.isdir(src) and not lay.is_dataset(src) \
                and Path(os.path.realpath(p)).is_relative_to(os.path.realpath(src)):
            raise DatasetError(f"lies inside the input folder {src}, where the report would be read as part of "
                               "the input next time; give a folder outside it", where=str(p))
    if p.is_dir() and not p.is_symlink():  # a run writing reports there now: refused before this one's work
        _refuse_if_busy(p)
    record = _read_list(p)
    listed = set(record.files)
    earlier = None if not record.exists else set()  # a list is the whole record; without one, the JSON of the reports
    for name in names:
        q = p / name
        if not os.path.lexists(q):
            continue
        if _is_input(q, inputs):
            raise DatasetError("is an input of this command; augsplit never replaces its input, give another --out",
                               where=str(q))
        if q.is_symlink() or not q.is_file():
            raise DatasetError("exists and is not a regular file; give another --out", where=str(q))
        if not own and name not in listed:
            if earlier is None:  # the reports' JSON is parsed only when a name is not on the list
                earlier = _earlier_reports(p)
                listed |= earlier
            if name not in listed:
                raise DatasetError("exists and augsplit has no record of writing it here (its list, " + REPORTS_LIST
                                   + ", names what it wrote); give another --out, or move the file", where=str(q))
        stamp = record.stamps.get(name)
        if stamp is not None and not _matches(q, stamp):
            raise DatasetError("exists and was changed since augsplit wrote it (its list, " + REPORTS_LIST
                               + ", records the file it wrote); give another --out, or move the file", where=str(q))
    return p


class ReportFolder:
    """The report folder of one run, open and locked (`report_set`): `write` puts a report
    file in it."""

    def __init__(self, path: Path, fd: int, names: set[str]):
        self.path, self._fd, self._names = path, fd, names

    def write(self, name: str, data: bytes | str) -> Path:
        """Write the report file `name` (one of the run's names) whole: under a temporary name,
        synced, renamed over the file it replaces, the folder synced; all in the open folder.
        A storage error (a full disk) is a one-line DatasetError; the old file stays whole."""
        if name not in self._names:
            raise ValueError(f"{name!r} is not one of this run's report files")
        raw = data.encode("utf-8") if isinstance(data, str) else data
        _write_in(self._fd, name, raw, self.path)
        return self.path / name


BUSY = "another augsplit run is writing reports in this folder; wait for it to end or give another --out"


def _refuse_if_busy(folder: Path) -> None:
    """One-line DatasetError BUSY if a run holds the folder's lock now (taken and let go)."""
    try:
        fd = open_folder(folder)
    except OSError:
        return  # report_set says why it cannot open the folder
    try:
        lock_folder(fd, folder, BUSY)
    finally:
        os.close(fd)


@contextmanager
def report_set(out, command: str, names, inputs=()):
    """The folder to write one run of `command`'s report files `names` in (a `ReportFolder`):
    `out`, made if missing (its parent must exist), once `check_report_folder` allows them
    there, opened and locked. When the block completes, the files `command` left there before
    that this run did not write are removed while each is still the file a completed run
    wrote, and this run's files are listed and stamped (see the module docstring). When it
    raises, nothing is removed, and only the files it did write (whose content changed) are
    listed and stamped, so the next run of the command still removes what the last completed
    run left. A process killed outright records nothing: a file it made is then refused by
    name, never lost."""
    if command not in COMMANDS:
        raise ValueError(f"not a command that writes reports: {command!r}")
    names = set(names)
    folder = ensure_folder(check_report_folder(out, sorted(names), inputs))
    try:  # the folder checked, opened once: its names are looked up in it, never through a link swapped in
        fd = open_folder(folder)
    except OSError as exc:
        raise DatasetError(f"cannot open the report folder: {exc.strerror}", where=str(folder)) from None
    try:
        lock_folder(fd, folder, BUSY)
        record = _read_list(folder, fd)
        # reports an earlier augsplit left, found by their JSON, join the first list as they are
        adopted = {n: _stamp(n, fd) for n in (() if record.exists else _earlier_reports(folder))}
        before = {n: _stamp(n, fd) for n in names}  # what each name holds before this run
        earlier = record.runs.get(command, set())
        try:
            yield ReportFolder(folder, fd, names)
        except BaseException:
            with suppress(Exception):  # the run's own error is the one to report
                now = {n: _stamp(n, fd) for n in names}
                wrote = {n for n in names if now[n] is not None and now[n] != before[n]}
                record = _read_list(folder, fd)
                record.runs[command] = earlier | wrote
                _record(record, {**adopted, **{n: now[n] for n in wrote}})
                _write_list(fd, record, folder)
            raise
        record = _read_list(folder, fd)
        for name in sorted(earlier - names):  # none stays this command's to remove
            stamp = record.stamps.pop(name, None) if name in record.files else None  # only a listed file goes
            if _remove_stale(fd, name, stamp, folder / name, inputs) or stamp is not None:
                # gone, or no longer the file augsplit wrote (changed, a link, an input): not augsplit's
                # now. An unstamped one (from a list without stamps) stays a name a later run may write over
                record.files.discard(name)
        record.runs[command] = names
        _record(record, {**adopted, **{n: _stamp(n, fd) for n in names}})
        _write_list(fd, record, folder)
    finally:
        os.close(fd)


def _record(record: _Record, stamps: dict) -> None:
    """List each file of `stamps` with its stamp (one that is not a regular file: neither)."""
    for name, stamp in stamps.items():
        if stamp is None:
            record.files.discard(name)
            record.stamps.pop(name, None)
        else:
            record.files.add(name)
            record.stamps[name] = stamp


def _remove_stale(fd: int, name: str, stamp, path: Path, inputs) -> bool:
    """Remove the stale report `name` of the folder open as `fd` if it is still the regular
    file a completed run stamped and none of the command's inputs; whether it is gone. A link
    is never followed, a folder never entered."""
    if _lstat(fd, name) is None:
        return True
    if stamp is None or not _matches(name, stamp, fd) or _is_input(path, inputs):  # a link or folder matches no stamp
        return False
    try:
        os.unlink(name, dir_fd=fd)  # unlink never follows a link: were it swapped for one, the link alone would go
    except FileNotFoundError:
        return True
    except OSError:
        return False
    return True


def _lstat(fd: int, name: str):
    """The folder entry's own stat (a link's, not its target's), None when it is not there."""
    try:
        return os.stat(name, dir_fd=fd, follow_symlinks=False)
    except OSError:
        return None


def _stamp(name, dir_fd: int | None = None, size: int | None = None) -> tuple[int, str] | None:
    """(size, SHA-256) of the regular file `name` (in the folder open as `dir_fd`), None for
    anything else (a link, a folder, nothing; or, given `size`, a file of another size, not
    read): what tells the file augsplit wrote from one saved or edited under its name since,
    wherever the folder is copied to."""
    try:
        fd = os.open(name, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0), dir_fd=dir_fd)
    except (OSError, ValueError):
        return None
    try:
        with os.fdopen(fd, "rb") as f:
            st = os.fstat(f.fileno())
            if not stat.S_ISREG(st.st_mode) or (size is not None and st.st_size != size):
                return None
            digest = hashlib.sha256()
            while chunk := f.read(1 << 20):
                digest.update(chunk)
    except OSError:
        return None
    return st.st_size, digest.hexdigest()


def _matches(name, stamp, dir_fd: int | None = None) -> bool:
    """Whether `name` is still the file `stamp` describes."""
    return _stamp(name, dir_fd, size=stamp[0]) == stamp


def _is_input(q: Path, inputs) -> bool:
    """Whether the file `q` is one of the command's inputs (a report folder inside an input
    folder is refused by `check_report_folder`, so a file is an input only by being one)."""
    for src in inputs:
        with suppress(OSError):  # an input that is not there (or a broken link) is not q
            if os.path.samefile(q, src):
                return True
    return False


def _earlier_reports(folder: Path) -> set[str]:
    """The reports an augsplit from before the list wrote in `folder`, known by their JSON: an
    audit.json of augsplit's audit schema (with its audit.html), a score.json with score's
    keys (with report.html and the CSV tables beside it). Nothing else is taken for ours."""
    found: set[str] = set()
    doc = _json(folder / "audit.json")
    if isinstance(doc, dict) and str(doc.get("schema", "")).startswith("augsplit.audit/"):
        found |= {"audit.json", "audit.html"}
    doc = _json(folder / "score.json")
    if isinstance(doc, dict) and ({"train_split", "reference_split", "n_scored"} <= set(doc)
                                  or {"models", "comparison"} <= set(doc)):
        found |= {"score.json", "report.html"} | {f.name for f in folder.glob("*.csv") if f.is_file()}
    return found


def _json(f: Path):
    try:
        if f.is_symlink() or not f.is_file() or f.stat().st_size > 64 << 20:
            return None
        return json.loads(f.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


@dataclass
class _Record:
    """A report folder's list: the files augsplit wrote there, the names each command's last
    run may have left, the stamp of each file a completed run wrote."""

    exists: bool = False
    files: set = field(default_factory=set)
    runs: dict = field(default_factory=dict)
    stamps: dict = field(default_factory=dict)


LIST_LIMIT = 64 << 20  # bytes; a list of a few hundred reports is a few kB


def _read_list(folder: Path, fd: int | None = None) -> _Record:
    """The folder's list (empty when it has none; a list from before runs and stamps were
    recorded has neither, so nothing of it is ever removed), looked up in the folder open as
    `fd` when given. Anything but the expected types and plain file names is a one-line
    DatasetError: a damaged list never decides a removal."""
    f = folder / REPORTS_LIST
    try:
        lfd = os.open(REPORTS_LIST if fd is not None else f, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK
                      | getattr(os, "O_CLOEXEC", 0), dir_fd=fd)
    except FileNotFoundError:
        return _Record()
    except OSError:  # a link (O_NOFOLLOW) or unreadable
        raise DatasetError("unreadable list of the reports augsplit wrote here; give another --out",
                           where=str(f)) from None
    try:
        with os.fdopen(lfd, "rb") as stream:
            st = os.fstat(stream.fileno())
            if not stat.S_ISREG(st.st_mode) or st.st_size > LIST_LIMIT:
                raise ValueError
            doc = json.loads(stream.read(LIST_LIMIT + 1).decode("utf-8"))
        if not isinstance(doc, dict):
            raise ValueError
        files = _names(doc["files"])
        runs, stamps = doc.get("runs", {}), doc.get("stamps", {})
        if not isinstance(runs, dict) or not isinstance(stamps, dict):
            raise ValueError
        _names(list(stamps))
        record = _Record(True, files, {_command(c): _names(n) for c, n in runs.items()},
                         {n: _stamp_of(v) for n, v in stamps.items()})
    except (OSError, ValueError, KeyError, TypeError, RecursionError):
        raise DatasetError("unreadable list of the reports augsplit wrote here; give another --out",
                           where=str(f)) from None
    return record


def _names(value) -> set[str]:
    if not isinstance(value, list) or not all(isinstance(n, str) and _plain_name(n) for n in value):
        raise ValueError
    return set(value)


def _command(c) -> str:
    if c not in COMMANDS:
        raise ValueError
    return c


def _stamp_of(v) -> tuple[int, str]:
    if not (isinstance(v, list) and len(v) == 2 and type(v[0]) is int and v[0] >= 0 and isinstance(v[1], str)
            and len(v[1]) == 64 and set(v[1]) <= set("0123456789abcdef")):
        raise ValueError
    return v[0], v[1]


def _plain_name(name: str) -> bool:
    """A name of a file in the folder itself (never a path, never the list itself)."""
    try:
        encoded = os.fsencode(name)
    except UnicodeError:  # a lone surrogate: no file is named so
        return False
    return (0 < len(encoded) <= 255 and "/" not in name and "\\" not in name and "\x00" not in name
            and name not in (".", "..", REPORTS_LIST))


def _write_list(fd: int, record: _Record, folder: Path) -> None:
    """Write the list in `folder`, open as `fd` (`_write_in`): a failure (a full disk) is a
    one-line DatasetError; the old list stays whole."""
    doc = {"files": sorted(record.files), "runs": {c: sorted(n) for c, n in sorted(record.runs.items())},
           "stamps": {n: list(record.stamps[n]) for n in sorted(record.stamps)}}
    _write_in(fd, REPORTS_LIST, json.dumps(doc, indent=1).encode("utf-8"), folder)


def _write_in(fd: int, name: str, data: bytes, folder: Path) -> None:
    """Write the file `name` of the folder open as `fd` whole and durably (io.replace_file_at:
    the folder's own entries, never through a link); where something other than a regular
    file holds the name, it is refused and left as it is. A storage error is a one-line
    DatasetError naming the file."""
    try:
        replace_file_at(fd, name, data, str(folder / name), sync=True)
    except OSError as exc:
        raise os_error(exc, folder / name) from None


