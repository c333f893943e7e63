"""The generator's side of a dataset folder: create or reopen it for a run (fresh, --resume,
--overwrite, a job-array peer), record the spec and storage layout in spec.json, tell whether
a shard is committed, and sweep temporaries. Every image and part path is made by `layout`
and checked to stay inside the folder."""

from __future__ import annotations

import json
import os
from contextlib import suppress
from pathlib import Path

import pyarrow.parquet as pq

from ..errors import DatasetError
from ..io import lock_folder, write_bytes_new
from . import layout as lay
from . import overwrite
from .boxfs import open_part
from .folder import LAYOUT_BEFORE, LAYOUT_KEYS, PNG_KEYS, part_box, read_spec_doc


class FolderLock:
    """A lock on the dataset folder held for a whole run (`flock` on the folder itself, so no
    file is added to it): exclusive for a run that may sweep or replace what is there (a
    fresh run, --resume, --overwrite, --finalize), shared by the job-array tasks of one run
    (--shard K/N). A second run finds it taken and is refused in one line, instead of sweeping
    the first run's temporaries from under it. Released when the run ends, or its process
    does. Where the file system has no such locks, runs are not kept apart."""

    def __init__(self, out: Path, shared: bool = False):
        self.out, self.shared, self.fd = Path(out), shared, None

    def take(self) -> None:
        """Take the lock if the folder exists and it is not held yet (a fresh run takes it as
        soon as it has made the folder)."""
        if self.fd is not None or not self.out.is_dir():
            return
        fd = os.open(self.out, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0) | getattr(os, "O_CLOEXEC", 0))
        try:
            lock_folder(fd, self.out, "another augsplit run is writing this folder; wait for it to end or stop it "
                        "(only the job-array tasks of one run, --shard K/N, share a folder)", shared=self.shared)
        except BaseException:
            os.close(fd)
            raise
        self.fd = fd

    def release(self) -> None:
        if self.fd is not None:
            os.close(self.fd)  # closing the descriptor drops the lock
        self.fd = None


def prepare(out: Path, built, layout: dict, *, resume: bool = False, overwrite_old: bool = False,
            array_shard=None, spec_path=None, lock: FolderLock | None = None) -> None:
    """Create or reopen the output folder; refuse to clobber anything without --overwrite.
    `lock` is taken before anything in an existing folder is read or moved, and as soon as a
    new folder is made."""
    out = Path(out)
    lock = lock or FolderLock(out, shared=array_shard is not None)
    for s in built.plan.splits:  # every split becomes folder names: refuse one that would leave `out`
        lay.component(s.name, f"split {s.name!r}")
    if out.exists() and not out.is_dir():
        raise DatasetError("the output path is a file, not a folder", where=str(out))
    for folder in built.input_folders.values():  # a dataset there would join the images the spec reads
        if overwrite.inside(out, folder):
            raise DatasetError(f"lies inside {folder}, a folder the spec reads images from; choose another --out",
                               where=str(out))
    if array_shard is not None and overwrite_old:
        raise DatasetError("--overwrite cannot be combined with --shard: each job of the array would delete the "
                           "others' work; remove the folder once, then submit the array", where=str(out))
    checked = False  # whether spec.json was found and compared with this run
    lock.take()
    if out.exists() and any(out.iterdir()):
        if overwrite_old:
            overwrite.clear(out, spec_path)
        elif resume or array_shard is not None:
            checked = check_resumable(out, built, layout, peer=array_shard is not None)
            if array_shard is None:
                # only a whole-run resume may sweep temporaries: job-array peers may be writing now
                remove_temporaries(out)
        else:
            raise DatasetError("the output folder exists and is not empty; use --resume to continue it "
                               "or --overwrite to replace it", where=str(out))
    try:
        out.mkdir(parents=True, exist_ok=True)
        lock.take()
        spec_file = out / lay.SPEC_FILE
        if not checked:
            # create-only: a job-array peer (or a second run) that got there first, even since
            # the checks above, keeps its spec.json, and this run goes on only if it is the same run
            if spec_file.exists() or not write_bytes_new(spec_file, _spec_doc(built, layout)):
                check_same_run(read_spec_doc(out), built, layout, out)
    except PermissionError as exc:
        raise DatasetError("permission denied", where=str(exc.filename or out)) from None
    except OSError as exc:
        raise DatasetError(f"cannot create the output folder: {exc.strerror}", where=str(exc.filename or out)) from None


def _spec_doc(built, layout: dict) -> bytes:
    """spec.json: the spec in its own key order (the order of splits and axes is part of every
    image's seed key and of its draws, so a sorted copy would re-make other images)."""
    doc = {"spec_hash": built.plan.hash, "base_dir": str(Path(built.base_dir).resolve()),
           "layout": layout, "inputs": built.input_digests(), "spec": json.loads(built.plan.settings.canonical)}
    return json.dumps(doc, indent=2).encode("utf-8")


def check_resumable(out: Path, built, layout: dict, peer: bool = False) -> bool:
    """The folder holds a run of this spec with these storage options (or, for a job-array
    peer, is being started by another peer: then False, as no spec.json was there to compare)."""
    if not (out / lay.SPEC_FILE).exists():
        # a job-array peer may have made the folder a moment ago and not yet renamed spec.json in
        strangers = [p.name for p in out.iterdir()
                     if p.name not in lay.OWN_ENTRIES and not p.name.startswith(f".{lay.SPEC_FILE}.tmp")]
        if not peer or strangers:
            raise DatasetError("the folder is not empty and holds no augsplit dataset to resume", where=str(out))
        return False
    check_same_run(read_spec_doc(out), built, layout, out)
    return True


def check_same_run(old: dict, built, layout: dict, out: Path) -> None:
    """A folder's spec.json (`old`) was written by a run of this spec, reading the same input
    files, with these storage options."""
    spec_hash = built.plan.hash
    if old["spec_hash"] != spec_hash:
        raise DatasetError(f"the folder holds a dataset of another spec (hash {old['spec_hash']}); "
                           f"this spec's hash is {spec_hash}", where=str(out))
    inputs = old.get("inputs") if isinstance(old.get("inputs"), dict) else {}  # none before they were recorded
    if inputs:
        now = built.input_digests()
        for key, digest in inputs.items():
            if now.get(key) != digest:
                raise DatasetError(f"the files of the spec's {key} folder changed since this dataset was started; "
                                   "a resumed run would mix images of the old and the new files: restore them, "
                                   "or start a new dataset", where=str(built.input_folders.get(key, out)))
    # a key the folder's run did not record (an option added since) counts as what such runs
    # did (LAYOUT_BEFORE), or, where that is not known, is not held against it
    recorded = {**LAYOUT_BEFORE, **(old.get("layout") or {})}
    # JPEG and WebP files never pass through the PNG writer: its options decide none of their bytes
    keys = LAYOUT_KEYS if layout.get("format") == "png" else [k for k in LAYOUT_KEYS if k not in PNG_KEYS]
    if layout.get("store") == "none" and recorded.get("store") == "none":
        # no image is stored: format and quality decide no byte (a folder made before --store none
        # refused --format jpeg recorded it), and export encodes with the recorded PNG setting
        keys = [k for k in keys if k not in ("format", "quality", *PNG_KEYS)]
    differ = [k for k in keys if k in recorded and recorded[k] != layout.get(k)]
    if differ:
        # a key the folder's run recorded as None (a PNG setting of a JPEG run) is no option to give
        want = " ".join(f"--{k.replace('_', '-')} {recorded[k]}" for k in differ if recorded[k] is not None)
        raise DatasetError(f"the folder was started with other storage options; rerun with {want}", where=str(out))


def remove_temporaries(out: Path) -> None:
    """Sweep temporaries of atomic writes a killed run left in augsplit's own folders: only
    those of a name augsplit writes there (a part, a shard archive, an image, spec.json or
    dataset.json), never a user's hidden file that merely looks like one."""
    for entry, final in ((lay.MANIFEST_DIR, lay.PART_RE), (lay.DISTRACTOR_DIR, lay.PART_RE),
                         (lay.SHARDS_DIR, lay.TAR_RE), (lay.IMAGES_DIR, lay.IMAGE_RE)):
        base = out / entry
        if base.is_dir() and not base.is_symlink():
            with os.scandir(base) as subs:
                for sub in subs:
                    if sub.is_dir(follow_symlinks=False):
                        _sweep(sub.path, lambda name: final.fullmatch(name) is not None)
    _sweep(out, lambda name: name in (lay.SPEC_FILE, lay.SUMMARY_FILE))


def _sweep(folder, ours) -> None:
    """Remove the temporaries of `ours` in one folder. Its entries are listed by name (scandir:
    a folder of images is not turned into as many Path objects: measured half the time per
    entry on 20,000 names in tmpfs), and a name is tested before anything else is looked up:
    first its leading dot (every temporary's name is hidden, lay.TEMPORARY_RE; a folder of
    images of 3,000 names is swept in 0.78x the time of matching each name, tmpfs)."""
    with os.scandir(folder) as entries:
        for f in entries:
            if (f.name.startswith(".") and lay.is_temporary(f.name) and ours(lay.final_name(f.name))
                    and f.is_file(follow_symlinks=False)):
                with suppress(FileNotFoundError):
                    os.unlink(f.path)


def part_complete(out: Path, split: str, shard: int, rows: int) -> bool:
    """Whether a shard is committed: its manifest part is there with all its rows (an
    unreadable part, left by a crash of the storage, is removed so the shard is redone)."""
    p = lay.part_path(out, lay.MANIFEST_DIR, split, shard)
    if not p.exists():
        return False
    with open_part(part_box(out), p) as f:  # a part linked out of the folder is refused, not read
        try:
            return pq.ParquetFile(f).metadata.num_rows == rows
        except Exception:  # noqa: BLE001 - an unreadable part is simply redone
            pass
    p.unlink(missing_ok=True)
    return False


def writable_dir(out: Path, table_or_images: str, split: str) -> Path:
    """The folder a shard writes into (`manifest/split=<s>`, `images/<s>` ...), created, and
    checked to lie inside `out` with no symbolic link on the way."""
    if table_or_images == lay.IMAGES_DIR:
        d = lay.image_dir(out, split)
    elif table_or_images == lay.SHARDS_DIR:
        d = (out / lay.tar_relpath(split, 0)).parent
    else:
        d = lay.part_path(out, table_or_images, split, 0).parent
    lay.no_symlink_below(out, d)
    d.mkdir(parents=True, exist_ok=True)
    lay.no_symlink_below(out, d)
    return d
