"""`augsplit verify`: a dataset folder is exactly what its spec says it is.

Checks: every shard is present; each row has its image and each image file (or shard archive)
its row; counts per split and class match the plan; each row's seed key is the plan's and its
id its split and index; every stored image, whatever its format, is read inside the folder (a
path out of it, a FIFO, a device or an oversized file is a finding, never read), matches the
checksum of its bytes recorded at write time, decodes to the canvas and, when lossless,
matches its pixel checksum; tar-store archives hold exactly each row's image and JSON row, in
order; and each image (or a `sample` of them) re-renders identically from its row alone.

Rows are read part by part in bounded batches (memory does not grow with the dataset); each
manifest part is one task, run serially, on local processes or on dask like generate's
shards, and the results are merged in part order, so every executor gives the same report.
What could not be checked is counted in `Report.skipped`, never passed over in silence.
"""

from __future__ import annotations

import bisect
import functools
import json
import os
import re
import stat
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa

from . import executors
from . import manifest as mf
from .dataset import layout as lay
from .dataset import open_dataset
from .dataset import tarstore
from .dataset.images import (FORMATS, PNG_SIGNATURE, ImageError, decode, max_bytes, rerender, row_where, sha256_hex,
                              stored_bytes)
from .dataset.rows import iter_batches
from .errors import AugsplitError, DatasetError
from .plan.draw import draw
from .plan.settings import settings_of
from .manifest import pixel_sha256
from .threads import limit_opencv

SHOWN = 5  # problems of one kind listed by name
BATCH_ROWS = 2048  # rows read at a time: memory is bounded by this, not by the dataset
STORED = ("files", "parquet", "tar")  # stores whose every row holds an image
# what the stored-image checks read of a row
LIGHT_COLUMNS = ("image_id", "split", "index", "file", "image_bytes", "sha256", "file_sha256", "tar_file", "tar_offset")


@dataclass
class Found:
    """How many of one kind of problem, and the first few (smallest, so the same whatever order
    parts finish in)."""

    n: int = 0
    examples: list = field(default_factory=list)

    def add(self, item: str) -> None:
        self.n += 1
        if len(self.examples) < SHOWN or item < self.examples[-1]:
            bisect.insort(self.examples, item)
            del self.examples[SHOWN:]

    def merge(self, other: "Found") -> None:
        for e in other.examples:
            bisect.insort(self.examples, e)
        del self.examples[SHOWN:]
        self.n += other.n


@dataclass
class Report:
    checked: int = 0
    rerendered: int = 0
    problems: list = field(default_factory=list)
    skipped: list = field(default_factory=list)  # what could not be checked, each counted

    def add(self, what: str) -> None:
        self.problems.append(what)

    def add_each(self, items: list[str], more: str) -> None:
        """The first few items by name, then how many more."""
        for item in items[:SHOWN]:
            self.add(item)
        if len(items) > SHOWN:
            self.add(f"... {len(items) - SHOWN} more {more}")

    def add_found(self, found: Found, more: str) -> None:
        for item in found.examples:
            self.add(item)
        if found.n > len(found.examples):
            self.add(f"... {found.n - len(found.examples)} more {more}")

    @property
    def ok(self) -> bool:
        return not self.problems


@dataclass(frozen=True)
class PartJob:
    """One manifest part to verify: its position in `folder.parts_of()`, and which of its rows
    (offsets within the part) to re-render, None for all."""

    index: int
    split: str
    shard: int
    rows: int
    rerender: tuple[int, ...] | None = None

    def __str__(self) -> str:
        return f"{self.split}/part-{self.shard:06d}"


@dataclass
class PartResult:
    rows: int = 0
    rerendered: int = 0
    no_byte_sum: int = 0  # stored images without a recorded checksum of their bytes
    classes: Counter = field(default_factory=Counter)
    suffixes: set = field(default_factory=set)  # the image-file suffixes its rows name
    bad_key: Found = field(default_factory=Found)
    bad_params: Found = field(default_factory=Found)  # rows whose parameters are not the spec's draw
    bad_id: Found = field(default_factory=Found)
    broken: Found = field(default_factory=Found)
    bad_bytes: Found = field(default_factory=Found)
    bad_pixels: Found = field(default_factory=Found)
    bad_render: Found = field(default_factory=Found)
    archive: Found = field(default_factory=Found)

    FOUND = ("bad_key", "bad_params", "bad_id", "broken", "bad_bytes", "bad_pixels", "bad_render", "archive")

    def merge(self, other: "PartResult") -> None:
        self.rows += other.rows
        self.rerendered += other.rerendered
        self.no_byte_sum += other.no_byte_sum
        self.classes.update(other.classes)
        self.suffixes |= other.suffixes
        for name in self.FOUND:
            getattr(self, name).merge(getattr(other, name))


def _check_sample(sample) -> None:
    if sample is not None and (isinstance(sample, bool) or not isinstance(sample, (int, np.integer)) or sample < 1):
        raise DatasetError(f"the sample size must be a whole number >= 1, got {sample!r}", where="--sample")


def verify(root: str | Path, sample: int | None = None, seed: int = 0, allow_incomplete: bool = False, *,
           workers: int = 1, executor: str = "auto", scheduler: str | None = None, progress: bool = False) -> Report:
    """Verify a dataset; `sample` re-renders only that many random rows (all when None) while
    every stored image is still read and checked. `workers`, `executor` and `scheduler` run the
    per-part checks as generate runs shards. An unfinished folder is refused unless
    `allow_incomplete` (then its absence of dataset.json is itself a finding)."""
    _check_sample(sample)
    executors.check_options(workers, executor)
    folder = open_dataset(root, allow_incomplete=allow_incomplete)
    plan = folder.plan  # built here, so forked workers inherit it
    rep = Report()
    if not folder.complete:
        rep.add("dataset.json is missing: generation did not finish (rerun generate --resume, or --finalize)")
    for problem in (_summary_problems(folder.summary, plan) if folder.complete else []) + _changed_inputs(folder):
        rep.add(problem)
    parts = folder.parts_of(lay.MANIFEST_DIR)
    total = sum(p.rows for p in parts)
    if total == 0:
        raise DatasetError("the dataset has no manifest rows", where=str(folder.root / lay.MANIFEST_DIR))
    picks = _sample(parts, total, sample, seed)
    jobs = [PartJob(k, p.split, p.shard, p.rows, picks[k] if picks is not None else None) for k, p in enumerate(parts)]
    by_split, present = _run(folder, jobs, workers, executor, scheduler, executors.progress(total, progress, "verify"))
    rep.checked = total
    _report(folder, plan, by_split, present, rep, sample)
    return rep


def _changed_inputs(folder) -> list[str]:
    """The spec's input folders whose files differ from those the dataset was made from (as
    spec.json recorded them; a folder made before they were recorded: none to compare)."""
    from .dataset.folder import read_spec_doc

    recorded = read_spec_doc(folder.root).get("inputs")
    if not isinstance(recorded, dict) or not recorded:
        return []
    built = folder.built
    now = built.input_digests()
    return [f"the files of the spec's {key} folder {built.input_folders.get(key)} differ from those the dataset "
            "was made from: images that use them no longer re-render identically"
            for key, digest in sorted(recorded.items()) if now.get(key) != digest]


def _summary_problems(summary: dict, plan) -> list[str]:
    """What dataset.json says that the spec does not: the summary generate wrote last, which
    other commands and people read for the folder's counts."""
    want = {"complete": True, "images": sum(s.total for s in plan.splits), "classes": list(plan.classes)}
    # (its spec_hash is open_dataset's check: a summary of another spec is refused there)
    out = [f"dataset.json says {key} {summary.get(key)!r}; expected {value!r}"
           for key, value in want.items() if summary.get(key) != value]
    splits = summary.get("splits") if isinstance(summary.get("splits"), dict) else {}
    for s in plan.splits:
        got = splits.get(s.name, {}).get("images") if isinstance(splits.get(s.name), dict) else None
        if got != s.total:
            out.append(f"dataset.json says split {s.name} has {got!r} images; expected {s.total}")
    out += [f"dataset.json names split {name!r}, which the spec has not" for name in splits
            if name not in {s.name for s in plan.splits}]
    return out


def _sample(parts, total: int, sample, seed: int) -> list[tuple[int, ...]] | None:
    """Row offsets to re-render in each part: `sample` distinct rows of the whole dataset."""
    if sample is None or sample >= total:
        return None
    chosen = np.sort(np.random.default_rng(seed).choice(total, size=sample, replace=False))
    starts = np.cumsum([0] + [p.rows for p in parts])
    out = []
    for k in range(len(parts)):
        lo, hi = np.searchsorted(chosen, [starts[k], starts[k + 1]])
        out.append(tuple(int(v) for v in chosen[lo:hi] - starts[k]))
    return out


# ---- running the per-part tasks -----------------------------------------------------------------

def _part_task(key: tuple, job: PartJob) -> PartResult:
    folder = executors.shared(key, lambda: open_dataset(key[1], allow_incomplete=key[2]))
    return check_part(folder, job)


def _run(folder, jobs, workers, executor, scheduler, bar) -> tuple[dict, dict]:
    """Run the part tasks; merge each result as it arrives (merging is order-free, so any
    executor gives the same report) into one result per split, keeping per part only what the
    stray-file scan needs: (split, shard) -> (rows, file suffixes)."""
    key = ("verify", str(folder.root.resolve()), not folder.complete)
    dask = executor == "dask" or bool(scheduler)
    client, cluster = executors.dask_client(scheduler, workers) if dask else (None, None)
    restore_threads = limit_opencv(1)  # per-image work is small: OpenCV's pool only burns CPU (see generate)
    by_split: dict[str, PartResult] = {}
    present: dict[tuple[str, int], tuple[int, frozenset]] = {}
    try:
        with executors.sharing(key, folder):
            stream = executors.run(functools.partial(_part_task, key), jobs, workers, executor=executor, client=client)
            for job, res in stream:
                by_split.setdefault(job.split, PartResult()).merge(res)
                present[job.split, job.shard] = (job.rows, frozenset(res.suffixes))
                bar.update(job.rows)
    finally:
        bar.close()
        restore_threads()
        if client is not None:
            executors.close_dask(client, cluster)
    return by_split, present


# ---- one part ----------------------------------------------------------------------------------


def check_part(folder, job: PartJob) -> PartResult:
    """Every row of one manifest part: identity, seed key, stored image, re-render."""
    part = folder.parts_of(lay.MANIFEST_DIR)[job.index]
    res = PartResult()
    store = folder.layout.get("store")
    split_index = folder.splits.index(job.split)
    first = job.shard * folder.shard_size
    want = None if job.rerender is None else set(job.rerender)
    seen: set[int] = set()
    archive = _Archive(folder, job)
    offset = 0
    spec_seed = settings_of(folder.spec).seed
    for batch in iter_batches(folder, parts=[part], batch_rows=BATCH_ROWS, arrow=True):
        ids = [str(v) for v in batch.column("image_id").to_pylist()]
        res.rows += batch.num_rows
        res.classes.update(batch.column("class_index").to_pylist())
        for iid, i in zip(ids, batch.column("index").to_pylist()):
            if iid != f"{job.split}-{i:07d}" or not first <= i < first + job.rows or i in seen:
                res.bad_id.add(iid)
            seen.add(i)
        keyed = ((batch.column("split_index").to_numpy(zero_copy_only=False) != split_index)
                 | (batch.column("seed").to_numpy(zero_copy_only=False) != spec_seed))
        for j in np.flatnonzero(keyed):
            res.bad_key.add(ids[j])
        _check_params(folder.plan.split(job.split), folder.plan, batch, ids, res)
        # whole rows only where a check needs every column (a tar member's JSON, a re-render):
        # converting all 40-odd columns of every row costs more than the checks
        whole = want is None or any(batch.column("tar_file").to_pylist())
        rows = (batch if whole else batch.select(list(LIGHT_COLUMNS))).to_pylist()
        for j, row in enumerate(rows):
            _check_stored(folder, row, store, archive, res)
            if want is None or offset + j in want:
                res.rerendered += 1
                _check_render(folder, _numeric_nulls_as_nan(row if whole else batch.slice(j, 1).to_pylist()[0]), res)
        offset += batch.num_rows
    archive.finish(res)
    return res


FLOAT_COLUMNS = tuple(c.name for c in mf.IMAGE_COLUMNS if pa.types.is_floating(c.type))


def _check_params(split, plan, batch, ids: list[str], res: PartResult) -> None:
    """Every column the spec draws for an image (class, instance, cell, each axis value in the
    spec's units and as rendered) must be what it draws for the row's index: a row edited
    after generation (an axis value moved, say) is named even where its image, re-rendered
    from the rendered values alone, still matches. Rows whose index is not the split's are
    named by the identity check instead."""
    index = batch.column("index").to_numpy(zero_copy_only=False)
    ok = np.flatnonzero((index >= 0) & (index < split.total))
    if not len(ok):
        return
    drawn = draw(plan, split, index[ok])
    wrong = np.zeros(len(ok), dtype=bool)
    columns: dict[int, list[str]] = {}
    for name, want in drawn.items():  # every one is in the part: open_dataset refuses parts off the schema
        got = batch.column(name).to_numpy(zero_copy_only=False)[ok]
        if want.dtype.kind == "f":  # within 1e-9 relative: numpy's vectorised exp, log and sin may
            got = np.asarray(got, dtype=float)  # round the last bit otherwise on another CPU
            with np.errstate(invalid="ignore"):
                same = np.isclose(got, want, rtol=1e-9, atol=1e-12) | (np.isnan(got) & np.isnan(want))
        else:
            same = np.asarray(got == want.astype(got.dtype) if want.dtype.kind in "biu" else
                              [a == b for a, b in zip(got, want)], dtype=bool)
        for k in np.flatnonzero(~same):
            columns.setdefault(int(k), []).append(name)
        wrong |= ~same
    for k in np.flatnonzero(wrong):
        res.bad_params.add(f"{ids[ok[k]]} ({', '.join(columns[int(k)])})")


def _numeric_nulls_as_nan(row: dict) -> dict:
    """A row as the renderer reads it: NaN where Parquet stores a null float (as pandas reads it)."""
    for k in FLOAT_COLUMNS:
        if row.get(k, 0) is None:
            row[k] = float("nan")
    return row


def _check_stored(folder, row, store, archive, res: PartResult) -> None:
    where = row_where(row)
    rel = row.get("file")
    if isinstance(rel, str) and rel:  # a row naming another file than its own: stored_bytes refuses it
        res.suffixes.add(os.path.splitext(rel)[1])
    try:
        tar = row.get("tar_file")
        data = archive.next(row, res) if isinstance(tar, str) and tar else stored_bytes(folder, row)
    except ImageError as exc:
        res.broken.add(f"{exc.where}: {exc.message}")
        return
    if data is None:
        if store in STORED:
            res.broken.add(f"{where}: the row stores no image, though the dataset's store is {store}")
        return
    recorded = row.get("file_sha256")
    if not isinstance(recorded, str) or not recorded:
        res.no_byte_sum += 1
    elif sha256_hex(data) != recorded:
        res.bad_bytes.add(where)
    try:
        img = decode(data, folder.channels, where, folder.hw)
    except ImageError as exc:
        res.broken.add(f"{exc.where}: {exc.message}")
        return
    if data.startswith(PNG_SIGNATURE) and pixel_sha256(img) != row["sha256"]:
        res.bad_pixels.add(where)


def _check_render(folder, row, res: PartResult) -> None:
    where = row_where(row)
    try:
        same = pixel_sha256(rerender(folder, row).image) == row["sha256"]
    except (AugsplitError, ValueError, KeyError, TypeError) as exc:  # a row too damaged to render
        res.bad_render.add(f"{where} ({exc.message if isinstance(exc, AugsplitError) else type(exc).__name__})")
        return
    if not same:
        res.bad_render.add(where)


class _Archive:
    """A part's shard archive read in one pass alongside its rows (tar store)."""

    def __init__(self, folder, job: PartJob):
        self.folder, self.job = folder, job
        self.rel = lay.tar_relpath(job.split, job.shard)
        self.limit = max_bytes(folder.hw, folder.channels)
        self.members = None
        self.dead = None  # the error that ended the archive

    def _next_member(self, where):
        if self.dead is not None:
            raise ImageError(f"not read: {self.dead}", where=where)
        if self.members is None:
            self.members = tarstore.iter_members(self.folder, self.rel, where, max(self.limit, tarstore.JSON_MAX_BYTES))
        try:
            return next(self.members)
        except StopIteration:
            self.dead = f"shard archive {self.rel} ends before this row's members"
        except ImageError as exc:
            self.dead = exc.message
        raise ImageError(self.dead, where=where)

    def next(self, row, res: PartResult) -> bytes:
        where, iid = row_where(row), str(row.get("image_id"))
        if row.get("tar_file") != self.rel:
            res.archive.add(f"{where}: tar_file {row.get('tar_file')!r} is not its shard's archive {self.rel}")
        ti, data = self._next_member(where)
        stem, _, ext = ti.name.rpartition(".")
        if stem != iid or f".{ext}" not in FORMATS.values() or data is None:
            raise ImageError(f"member {ti.name!r} of {self.rel} is where this row's image should be", where=where)
        if tarstore.plain(row.get("tar_offset")) != ti.offset:
            res.archive.add(f"{where}: tar_offset {row.get('tar_offset')} but the image's header is at {ti.offset}")
        tj, blob = self._next_member(where)
        if tj.name != f"{iid}.json" or blob is None:
            res.archive.add(f"{where}: member {tj.name!r} of {self.rel} is where the row's JSON should be")
        else:
            try:
                same = json.loads(blob) == tarstore.row_record(row)
            except ValueError:
                same = False
            if not same:
                res.archive.add(f"{where}: the JSON member {tj.name} differs from the manifest row")
        return data

    def finish(self, res: PartResult) -> None:
        if self.members is None or self.dead is not None:
            return
        extra = sum(1 for _ in self.members)
        if extra:
            res.archive.add(f"shard archive {self.rel}: {extra} members after the last row's")


# ---- the whole report ----------------------------------------------------------------------------


def _report(folder, plan, by_split: dict, present: dict, rep: Report, sample) -> None:
    whole = PartResult()
    for name in folder.splits:
        if name in by_split:
            whole.merge(by_split[name])
    for s in plan.splits:
        got = by_split.get(s.name, PartResult())
        if got.rows != s.total:
            rep.add(f"split {s.name}: {got.rows} rows, the plan says {s.total}")
        for c, n in enumerate(s.counts):
            if got.classes.get(c, 0) != n:
                rep.add(f"split {s.name}, class {plan.classes[c]}: {got.classes.get(c, 0)} rows, the plan says {n}")
                break
        if got.bad_key.n:
            rep.add(f"split {s.name}: {got.bad_key.n} rows whose seed key (seed, split_index) is not the plan's, "
                    f"e.g. {got.bad_key.examples[0]}")
        if got.bad_params.n:
            rep.add(f"split {s.name}: {got.bad_params.n} rows whose parameters are not what the spec draws for "
                    f"their index, e.g. {'; '.join(got.bad_params.examples[:3])}")
    if whole.bad_id.n:
        rep.add(f"{whole.bad_id.n} image ids that are not their split and index within their shard, or repeat, "
                f"e.g. {', '.join(whole.bad_id.examples[:3])}")
    rep.add_found(_strays(folder, present), "files without rows")
    rep.add_found(whole.broken, "rows whose image cannot be read")
    rep.add_found(whole.archive, "shard archive problems")
    for found, what in ((whole.bad_bytes, "do not match their checksum (stored bytes)"),
                        (whole.bad_pixels, "do not match their checksum (pixels)")):
        if found.n:
            rep.add(f"{found.n} stored images {what}, e.g. {'; '.join(found.examples[:3])}")
    if whole.bad_render.n:
        rep.add(f"{whole.bad_render.n} images do not re-render identically from their rows, "
                f"e.g. {'; '.join(whole.bad_render.examples[:3])}")
    rep.rerendered = whole.rerendered
    if whole.no_byte_sum:
        rep.skipped.append(f"{whole.no_byte_sum} stored images have no recorded checksum of their bytes (written "
                           "before it was recorded): only decoded, size-checked and, for PNG, pixel-checked")
    if whole.rerendered < rep.checked:
        rep.skipped.append(f"{rep.checked - whole.rerendered} of {rep.checked} rows not re-rendered "
                           f"(--sample {sample}); every stored image was still read and checked")


def _strays(folder, present: dict) -> Found:
    """Files in images/ and shards/ that no row names, found by name alone (a row's file is
    `images/<split>/<split>-<index>.<ext>` and its shard has a part), listing each folder once:
    no set of every file name is held."""
    root, size = folder.root, folder.shard_size
    strays = Found()
    images = root / lay.IMAGES_DIR
    for sub in _entries(images):
        if not sub.is_dir(follow_symlinks=False):
            strays.add(f"image without a row: {lay.IMAGES_DIR}/{sub.name}")
            continue
        pattern = re.compile(re.escape(sub.name) + r"-(\d{7,})(\.\w+)")
        for f in _entries(Path(sub.path)):
            m = pattern.fullmatch(f.name)
            listed = False
            if m and (f.is_file(follow_symlinks=False) or f.is_symlink()):
                index = int(m.group(1))
                rows, suffixes = present.get((sub.name, index // size), (0, set()))
                listed = index % size < rows and m.group(2) in suffixes
            if not listed:
                strays.add(f"image without a row: {lay.IMAGES_DIR}/{sub.name}/{f.name}")
    for sub in _entries(root / lay.SHARDS_DIR):
        for f in _entries(Path(sub.path)) if sub.is_dir(follow_symlinks=False) else [sub]:
            m = lay.TAR_RE.fullmatch(f.name)
            split = sub.name.partition("=")[2]
            ok = m and sub.name.startswith("split=") and (split, int(m.group(1))) in present and \
                stat.S_ISREG(f.stat(follow_symlinks=False).st_mode)
            if not ok:
                strays.add(f"shard archive without a manifest part: {os.path.relpath(f.path, root)}")
    return strays


def _entries(path: Path):
    if not path.is_dir() or path.is_symlink():
        return []
    return lay.listing(path)
