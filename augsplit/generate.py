"""Orchestration: plan -> shards -> executor -> writer; resume; job-array shards; the summary.

A split's images are cut into shards of consecutive indices. A shard writes its image files
(each straight to its name, all synced together) and then its manifest part (atomically,
streamed in row groups): the part file is the shard's commit, so an interrupted run resumes
by redoing exactly the shards without one. Committing (mostly a wait on the disk) overlaps
rendering: a serial run commits each shard while it renders the next; local worker processes
render and write, and the driver commits their shards while they render the next (dask workers,
maybe on other machines, commit their own). Output is byte-identical whatever the number of
workers, shards or executor.
"""

from __future__ import annotations

import functools
import itertools
import json
import os
from contextlib import ExitStack, closing, contextmanager, suppress
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import executors
from . import manifest as mf
from .columnar import floats, to_arrow
from .build import Built, build, open_spec
from .dataset import create, open_dataset
from .dataset import layout as lay
from .dataset.folder import LAYOUT_KEYS, check_parts
from .dataset.rows import read_column
from .dataset.images import FORMATS, encode, opened_path, sha256_hex
from .dataset.png import DEFLATES, png_setting
from .dataset.tarstore import TarShardWriter, json_values
from .dataset.tarstore import header as tar_header
from .errors import DatasetError
from .io import (DISK_FULL, folder_identity, move_into_place, new_temporary, open_folder, os_error, replace_file_at,
                 sync_in_folder, write_new_file, write_text_atomic)
from .limits import MAX_SHARDS_PER_SPLIT, MAX_WORKERS
from .plan.draw import draw
from .manifest import pixel_sha256
from .scene import SCENE_KEYS, native_diameter, scene_batches
from .spec import parse_spec
from .threads import limit_opencv

STORES = ("files", "parquet", "tar", "none")
# OpenCV's ranges (imgcodecs: IMWRITE_JPEG_QUALITY 0-100, IMWRITE_WEBP_QUALITY 1-100 lossy);
# PNG ignores the value, which must still be a quality a reader would recognise
QUALITY = {"png": (0, 100), "jpeg": (0, 100), "webp": (1, 100)}
EXECUTORS = executors.EXECUTORS

# A row group holds at most this many rows, and (with --store parquet) about this many bytes
# of raw pixels, so a shard of any size is rendered and written in bounded memory.
ROW_GROUP_ROWS = 1024
ROW_GROUP_BYTES = 32 << 20


@dataclass(frozen=True)
class Options:
    store: str = "files"
    format: str = "png"
    quality: int = 95  # JPEG / WebP quality
    # the library that deflates PNG files, "isal" or "zlib", and its level (isal 0-2, zlib 0-9);
    # None: the default for the spec's background kind and that library's default level
    # (dataset/png.py). Stored bytes only: PNG is lossless
    png_deflate: str | None = None
    png_level: int | None = None
    shard_size: int = 500
    workers: int = 1
    resume: bool = False
    overwrite: bool = False
    progress: bool = True
    array_shard: tuple[int, int] | None = None  # (k, n): make only job-array shard k of n
    executor: str = "auto"  # auto (serial for 1 worker, else processes), serial, processes, dask
    scheduler: str | None = None  # dask scheduler address; None with executor dask: a LocalCluster
    force_workers: bool = False  # take `workers` as given (up to MAX_WORKERS), not min(workers, shards, cores)


@dataclass(frozen=True)
class ShardJob:
    split: str
    split_index: int
    shard: int
    start: int
    stop: int

    def __str__(self) -> str:
        return f"{self.split}/part-{self.shard:06d} (images {self.start}..{self.stop - 1})"


def shard_jobs(built: Built, shard_size: int) -> list[ShardJob]:
    jobs = []
    for s in built.plan.splits:
        for k, start in enumerate(range(0, s.total, shard_size)):
            jobs.append(ShardJob(s.name, s.index, k, start, min(start + shard_size, s.total)))
    return jobs


def array_jobs(jobs: list[ShardJob], k: int, n: int) -> list[ShardJob]:
    """The shards job-array task k of n makes: every n-th shard of the whole dataset, from k."""
    return jobs[k::n]


def rows_per_group(built: Built, opts: Options) -> int:
    if opts.store != "parquet":
        return ROW_GROUP_ROWS
    c = built.plan.canvas
    raw = c.width * c.height * built.plan.render.channels
    return int(max(1, min(ROW_GROUP_ROWS, ROW_GROUP_BYTES // raw)))


# ---- one shard ---------------------------------------------------------------------------------


class _ImageFiles:
    """A shard's image files, each written as soon as it is encoded, straight to its final name
    (create-only: `io.write_new_file`). Where something is already there (an image of an
    earlier attempt at this uncommitted shard, or anything else), it is replaced whole through
    a temporary, and only if it is a regular file (`io.replace_file_at`).

    Every file is made by name in the folder opened once (`io.open_folder`) and checked to be
    the shard's image folder as the kernel names it: a folder on the way swapped for a link
    later cannot send the writes elsewhere (by path, each write would follow it). It also
    spares the kernel the walk down the path per file.

    Their names go to the shard's `images`, which the shard's finish makes durable at once in
    the same folder, found again by its identity (`io.sync_in_folder`: one syncfs, measured
    cheaper than one per batch; then the folder fsynced), before it commits the shard's part.
    A crash before that, even half-way through a file, leaves the shard without a part:
    nothing reads its images, and a resumed run writes every one of them again. Written
    inline: a writer thread measured the same on tmpfs, and 0.86x to 1.2x the time of inline
    writes on an erratic shared ext4 disk (load 3 on 2 cores), so the simpler way was kept."""

    def __init__(self, out: Path, folder: Path, shard: "WrittenShard"):
        self.folder = str(folder)
        self.written = shard.images
        self.fd = open_folder(folder)
        expected = os.path.join(os.path.realpath(out), os.path.relpath(folder, out))
        if opened_path(self.fd, self.folder) != expected:
            self.close()
            raise DatasetError("changed while it was being opened (a folder on the way replaced by a link?); "
                               "nothing was written there", where=self.folder)
        shard.image_folder = (self.folder, folder_identity(self.fd))

    def write(self, name: str, data: bytes) -> None:
        try:
            if not write_new_file(name, data, self.fd):
                replace_file_at(self.fd, name, data, os.path.join(self.folder, name))
        except OSError as exc:
            raise _disk_error(exc, os.path.join(self.folder, name)) from None
        self.written.append(name)

    def close(self) -> None:
        os.close(self.fd)


@dataclass
class WrittenShard:
    """A shard whose image files and parts are written, the parts whole under temporary names,
    but not yet committed: `finish` makes the images durable, puts the parts in place, the
    manifest part last (its presence is the shard's commit), and returns the number of images;
    `abandon` removes the temporaries, leaving the shard to be made again. It holds only paths,
    so a pool worker hands it to the driver, which finishes it.

    The finish is mostly a wait on the disk, which the driver overlaps with the rendering of
    the next shards (`executors.finish_overlapped`): a serial run's own next shard, or the pool
    workers', which then never wait on the disk themselves (measured: a worker of a 2-worker
    `--store files` run on ext4 spent about 10% of its time in that wait)."""

    job: ShardJob
    images: list = field(default_factory=list)  # names of the image files written unsynced
    image_folder: tuple | None = None  # (path, folder_identity) of the folder they were written in
    others: list = field(default_factory=list)  # (temporary, final) of the distractor part and the tar
    part: tuple | None = None  # (temporary, final) of the manifest part: the commit

    def temporary(self, final: Path, commit: bool = False) -> Path:
        """A temporary name for `final`, recorded so that `finish` puts it in place (last, for
        the `commit`, the manifest part)."""
        tmp = new_temporary(final)
        if commit:
            self.part = (tmp, final)
        else:
            self.others.append((tmp, final))
        return tmp

    def finish(self) -> int:
        try:
            if self.images:
                folder, identity = self.image_folder
                _guard_disk(lambda: sync_in_folder(folder, identity, self.images), folder)
            _guard_disk(lambda: move_into_place([*self.others, self.part]), self.part[1])
        except BaseException:
            self.abandon()
            raise
        return self.job.stop - self.job.start

    def abandon(self) -> None:
        for tmp, _final in [*self.others, *([self.part] if self.part else [])]:
            with suppress(OSError):
                os.unlink(tmp)


def write_shard(built: Built, job: ShardJob, out: Path, opts: Options) -> WrittenShard:
    """Render and store one shard, up to its commit (`WrittenShard.finish`).

    Rows are rendered and written one row group at a time (memory stays flat however large
    the shard); image files are written before the manifest part, whose rename commits."""
    plan = built.plan
    split = plan.split(job.split)
    meta = mf.file_metadata(plan.settings.canonical, plan.hash)
    step = rows_per_group(built, opts)
    part = lay.part_path(out, lay.MANIFEST_DIR, job.split, job.shard)
    dpart = lay.part_path(out, lay.DISTRACTOR_DIR, job.split, job.shard)
    shard = WrittenShard(job)
    try:
        _guard_disk(lambda: create.writable_dir(out, lay.MANIFEST_DIR, job.split), out)
        with ExitStack() as stack:  # on a failure, every writer is closed and its file discarded
            files = None
            if opts.store == "files":
                folder = _guard_disk(lambda: create.writable_dir(out, lay.IMAGES_DIR, job.split), out)
                files = _guard_disk(lambda: _ImageFiles(out, folder, shard), folder)
                stack.callback(files.close)
            writer = stack.enter_context(_parquet_writer(shard.temporary(part, commit=True),
                                                        mf.IMAGE_SCHEMA.with_metadata(meta)))
            dwriter = None
            tar = None
            if opts.store == "tar":
                tar = _guard_disk(lambda: stack.enter_context(_tar_writer(shard, out, job)), out)
            for lo in range(job.start, job.stop, step):
                cols, dcols = _render_rows(built, split, job, np.arange(lo, min(lo + step, job.stop)), opts, files)
                table = mf.to_table(cols, mf.IMAGE_SCHEMA, meta)
                if tar is not None:
                    table = _guard_disk(lambda: _add_to_tar(tar, table, job, FORMATS[opts.format]), part)
                _guard_disk(lambda: writer.write_table(table), part)
                if dcols:
                    if dwriter is None:
                        _guard_disk(lambda: create.writable_dir(out, lay.DISTRACTOR_DIR, job.split), out)
                        dwriter = stack.enter_context(_parquet_writer(shard.temporary(dpart),
                                                                      mf.DISTRACTOR_SCHEMA.with_metadata(meta)))
                    _guard_disk(lambda: dwriter.write_table(mf.to_table(dcols, mf.DISTRACTOR_SCHEMA, meta)), dpart)
            writers = stack.pop_all()
        # the footers, the archive's end: each file whole under its temporary name
        _guard_disk(writers.close, part)
    except BaseException:
        shard.abandon()
        raise
    return shard


@contextmanager
def _tar_writer(shard: WrittenShard, out: Path, job: ShardJob):
    """The shard's archive, written to a temporary name that the shard's finish puts in place."""
    create.writable_dir(out, lay.SHARDS_DIR, job.split)
    with open(shard.temporary(out / lay.tar_relpath(job.split, job.shard)), "xb", buffering=1 << 20) as f:
        writer = TarShardWriter(f)
        yield writer
        writer.close()
        f.flush()


def _add_to_tar(tar: TarShardWriter, table: pa.Table, job: ShardJob, suffix: str) -> pa.Table:
    """Append a row group's (image, JSON row) members; the table with image_bytes moved out
    and each row's tar_offset filled in."""
    data = table.column("image_bytes").to_pylist()
    # each record as a table row's to_pylist, plus its split, made column by column (NaN to
    # null only where a column is of floats). With the headers' checksums summed from their
    # varying fields, this step measured 19-33 us per image, 34-42 us when each row was turned
    # into a dict, then cleaned value by value (best of 9, CPU time); the same bytes
    names = [n for n in table.column_names if n != "image_bytes"]
    columns = [json_values(table.column(n)) for n in names]
    names.append("split")
    columns.append(itertools.repeat(job.split))
    offsets = []
    for blob, values in zip(data, zip(*columns)):
        rec = dict(zip(names, values))
        offsets.append(tar.add(rec["image_id"], suffix, blob, rec))
    i = table.schema.get_field_index("tar_offset")
    table = table.set_column(i, table.schema.field(i), to_arrow(offsets, pa.int64()))
    i = table.schema.get_field_index("image_bytes")
    return table.set_column(i, table.schema.field(i), pa.nulls(len(data), pa.binary()))


@contextmanager
def _parquet_writer(path: Path, schema):
    """A Parquet writer closed on leaving; when leaving on an error the part is discarded, and a
    second error while closing (a full disk refusing the footer) must not replace the first,
    which says what happened."""
    sink = pa.OSFile(str(path), "wb")  # ours to close: a writer that failed to close keeps its file open
    try:
        # No dictionary encoding: nearly every column is unique per row (ids, hashes, drawn
        # values) or constant, which zstd packs as well. Measured on 500-row parts of
        # bench_generate's spec: 0.62-0.78x the write time and 0.91-0.98x the bytes of
        # pyarrow's default (dictionary on every column); readers see the same columns.
        writer = pq.ParquetWriter(sink, schema, compression="zstd", use_dictionary=False)
        try:
            yield writer
        except BaseException:
            with suppress(Exception):
                writer.close()
            raise
        writer.close()
    finally:
        with suppress(Exception):
            sink.close()


def _render_rows(built: Built, split, job: ShardJob, indices: np.ndarray, opts: Options, files):
    """Image and distractor columns for some consecutive image indices of one shard.

    Each batch of scenes goes through one step at a time (geometry columns, pixel hashes,
    encoding, file writes) rather than one image through every step: measured 1.1-1.2x
    faster per image, as each step's code and data stay in the CPU's caches."""
    plan = built.plan
    cols = draw(plan, split, indices)
    n = len(indices)
    thr = plan.render.alpha_threshold
    # what the scenes read of each row, as plain Python scalars (a dict of every drawn column,
    # 21 on bench_generate's spec, measured 0.5-2 us more per image)
    rows = [dict(zip(SCENE_KEYS, vals)) for vals in zip(*(cols[k].tolist() for k in SCENE_KEYS))]
    ids = [f"{job.split}-{i:07d}" for i in cols["index"].tolist()]
    if files is not None:
        # the split is checked to be one path component once, here; then each name (the
        # split, a dash, digits and the suffix) is one as well (layout.image_relpath's)
        folder = lay.image_folder_relpath(job.split)
        names = [image_id + FORMATS[opts.format] for image_id in ids]
    bbox, footprint_px, visible, n_dist, size_px = [], [], [], [], []  # Python lists: cheap appends
    file_col, data_col, sums, byte_sums = [], [], [], []
    dist_rows: list[dict] = []
    diameters: dict = {}  # per sprite: its native diameter is a function of the sprite alone
    r = 0
    for scenes in scene_batches(plan, built.source, built.background, split, rows):
        at = r
        for scene in scenes:
            row, t = rows[r], scene.target
            bbox.append(t.bbox)
            footprint_px.append(t.footprint_px)
            visible.append(t.visible_fraction)
            n_dist.append(len(scene.distractors))
            key = (row["class_index"], row["instance"])
            if key not in diameters:
                diameters[key] = native_diameter(built.source.sprite(*key), thr)
            size_px.append(diameters[key] * row["scale"])
            dist_rows += ({"image_id": ids[r], **d} for d in scene.distractors)
            r += 1
        sums += (pixel_sha256(scene.image) for scene in scenes)
        if opts.store == "none":
            data = [None] * len(scenes)
        else:
            data = [encode(scene.image, opts.format, opts.quality, opts.png_level, opts.png_deflate) for scene in scenes]
        byte_sums += (sha256_hex(d) if d is not None else None for d in data)
        if files is None:
            file_col += [""] * len(scenes)
            data_col += data
            continue
        for name, d in zip(names[at:r], data):
            files.write(name, d)
            file_col.append(f"{folder}/{name}")
        data_col += [None] * len(scenes)
    bbox = np.array(bbox, dtype=np.int64).reshape(n, 4)
    size_px = np.array(size_px, dtype=np.float64)
    cols.update(image_id=ids, bbox_x0=bbox[:, 0], bbox_y0=bbox[:, 1], bbox_x1=bbox[:, 2], bbox_y1=bbox[:, 3],
                footprint_px=np.array(footprint_px, dtype=np.int64),
                visible_fraction=np.array(visible, dtype=np.float64), n_distractors=np.array(n_dist, dtype=np.int64),
                file=file_col, image_bytes=data_col, sha256=sums, file_sha256=byte_sums,
                tar_file=[lay.tar_relpath(job.split, job.shard) if opts.store == "tar" else ""] * n,
                size_px=size_px, split_index=np.full(n, job.split_index),
                seed=np.full(n, plan.seed), width=np.full(n, plan.canvas.width),
                height=np.full(n, plan.canvas.height))
    if plan.canvas.viewing is not None:
        cols["size_deg"] = plan.canvas.viewing.size_to_deg(size_px)
    else:
        cols["size_deg"] = np.full(n, np.nan)
    dcols = {k: [d[k] for d in dist_rows] for k in dist_rows[0]} if dist_rows else None
    return cols, dcols


def _guard_disk(fn, where: Path):
    """Run a write; turn the OSErrors storage raises into one-line DatasetErrors."""
    try:
        return fn()
    except DatasetError:
        raise
    except OSError as exc:
        raise _disk_error(exc, where) from None


def _disk_error(exc: OSError, where) -> DatasetError:
    if exc.errno in DISK_FULL:
        return DatasetError("disk full; completed shards are kept; free space and rerun with --resume",
                            where=str(exc.filename or where))
    return os_error(exc, exc.filename or where)


# ---- worker plumbing: each process builds the spec once ------------------------------------


def _worker_state(spec_json: str, base_dir: str, out: str, opts_json: str) -> tuple[Built, Path, Options]:
    """What a fresh worker process (spawned, or a dask worker) builds for itself."""
    opts = json.loads(opts_json)
    if opts.get("array_shard") is not None:
        opts["array_shard"] = tuple(opts["array_shard"])
    return build(parse_spec(json.loads(spec_json)), Path(base_dir)), Path(out), Options(**opts)


def _written_task(state_key: tuple, job: ShardJob) -> WrittenShard:
    """The task a local pool worker runs, with the driver's built spec (a forked worker
    inherits it; planning a large canvas takes seconds) or one built once per fresh process:
    one shard, written but left for the driver to commit (the same kernel, so the driver's
    sync makes the worker's writes durable)."""
    built, out, opts = executors.shared(state_key, lambda: _worker_state(*state_key[1:]))
    return write_shard(built, job, out, opts)


def _shard_task(state_key: tuple, job: ShardJob) -> int:
    """The task a dask worker runs: one shard, committed there (a dask worker may be another
    machine, whose writes only its own sync makes durable)."""
    return _written_task(state_key, job).finish()


# ---- the output folder ----------------------------------------------------------------------


def _layout(opts: Options) -> dict:
    """The options that decide the bytes on disk: a resumed run or a job-array peer must share them."""
    return {k: getattr(opts, k) for k in LAYOUT_KEYS}


def shard_done(out: Path, job: ShardJob) -> bool:
    return create.part_complete(out, job.split, job.shard, job.stop - job.start)


# ---- the whole run -------------------------------------------------------------------------


def check_options(opts: Options) -> None:
    if opts.store not in STORES:
        raise DatasetError(f"unknown store '{opts.store}'; use one of {', '.join(STORES)}")
    if opts.format not in FORMATS:
        raise DatasetError(f"unknown image format '{opts.format}'; use one of {', '.join(FORMATS)}")
    if opts.store == "none" and opts.format != "png":
        raise DatasetError(f"--store none keeps no image bytes: its images are re-made losslessly when read (and "
                           f"exported as PNG), so {opts.format} would decide nothing; for {opts.format} images use "
                           "--store files, parquet or tar", where="--format")
    executors.check_options(opts.workers, opts.executor)
    if opts.shard_size < 1:
        raise DatasetError(f"shard size must be at least 1, got {opts.shard_size}", where="--shard-size")
    if opts.force_workers and opts.workers > MAX_WORKERS:
        raise DatasetError(f"{opts.workers} workers are above the limit of {MAX_WORKERS} even when forced "
                           "(limits.MAX_WORKERS)", where="--workers")
    lo, hi = QUALITY[opts.format]
    if not lo <= opts.quality <= hi:
        raise DatasetError(f"quality must lie in {lo}..{hi} for {opts.format}, got {opts.quality}", where="--quality")
    if opts.png_deflate is not None and not (isinstance(opts.png_deflate, str) and opts.png_deflate in DEFLATES):
        raise DatasetError(f"unknown PNG deflate library '{opts.png_deflate}'; use one of {', '.join(DEFLATES)}",
                           where="--png-deflate")
    # without a library, a level either takes (the spec's background picks one: with_png_defaults)
    _check_png_level(opts.png_level, [opts.png_deflate] if opts.png_deflate else list(DEFLATES))
    if opts.array_shard is not None:
        k, n = opts.array_shard
        if n < 1:
            raise DatasetError(f"shard {k}/{n}: N, the number of jobs, must be at least 1", where="--shard")
        if not 0 <= k < n:
            raise DatasetError(f"shard {k}/{n}: K must lie in 0..{n - 1}", where="--shard")


def _check_png_level(level, names: list[str], why: str = "") -> None:
    if level is None:
        return
    lo, hi = min(DEFLATES[n].levels[0] for n in names), max(DEFLATES[n].levels[-1] for n in names)
    if isinstance(level, bool) or not isinstance(level, int) or not lo <= level <= hi:
        raise DatasetError(f"PNG level must be an integer in {lo}..{hi} for {' or '.join(names)}{why}, got {level!r}",
                           where="--png-level")


def usable_workers(opts: Options, n_shards: int) -> int:
    """Worker processes worth starting: more than the shards or the CPU cores only slow a run
    down and cost memory, unless `force_workers` (for a remote scheduler the count is unused)."""
    if opts.force_workers:
        return opts.workers
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(1, min(opts.workers, n_shards, cores))


def with_png_defaults(opts: Options, built: Built) -> Options:
    """The options with the PNG deflate library and level filled in where they were left to
    the defaults (the layout records what was used). A JPEG or WebP run deflates nothing: its
    PNG options are None, so neither a level nor a library it does not use is held against it."""
    if opts.format != "png":
        return replace(opts, png_deflate=None, png_level=None)
    kind = built.plan.render.background
    deflate, level = png_setting(opts.png_deflate, opts.png_level, kind)
    if opts.png_deflate is None:  # check_options allowed any library's level: the background's must take it
        _check_png_level(opts.png_level, [deflate], f" (the default for a {kind} background; --png-deflate "
                                                    f"{' or '.join(n for n in DEFLATES if n != deflate)} takes others)")
    return replace(opts, png_deflate=deflate, png_level=level)


def _check_shards(built: Built, opts: Options) -> Options:
    """The run's options with `workers` capped; refuses more shards per split than part names hold."""
    most = max(-(-s.total // opts.shard_size) for s in built.plan.splits)
    if most > MAX_SHARDS_PER_SPLIT:
        raise DatasetError(f"a split of {most:,} shards is above the limit of {MAX_SHARDS_PER_SPLIT:,} "
                           "(limits.MAX_SHARDS_PER_SPLIT); use a larger --shard-size", where="--shard-size")
    n_shards = sum(-(-s.total // opts.shard_size) for s in built.plan.splits)
    return replace(opts, workers=usable_workers(opts, n_shards))


def generate(spec_path: str | Path | None, out: str | Path, opts: Options = Options(), built: Built | None = None) -> dict:
    """Make (or resume, or finish one job-array shard of) the dataset; returns the summary."""
    check_options(opts)
    built = built or open_spec(spec_path)
    opts = _check_shards(built, with_png_defaults(opts, built))
    out = Path(out)
    if opts.store == "tar":  # every member name must fit a ustar header: refused before any work
        for s in built.plan.splits:
            tar_header(f"{s.name}-{max(s.total - 1, 0):07d}.json", 0)
    dask = opts.executor == "dask" or bool(opts.scheduler)
    # connect first: an unreachable scheduler must fail before the output folder is touched
    client, cluster = executors.dask_client(opts.scheduler, opts.workers) if dask else (None, None)
    # OpenCV's own thread pool gains nothing on per-object boxes this small but spins a second
    # core (measured: 2x the CPU per image, same wall time); pool workers forked from here
    # inherit the setting. Same pixels either way. Restored when the run ends.
    restore_threads = limit_opencv(1)
    lock = create.FolderLock(out, shared=opts.array_shard is not None)
    try:
        if opts.scheduler:
            _check_worker_versions(client, opts.scheduler)
        create.prepare(out, built, _layout(opts), resume=opts.resume, overwrite_old=opts.overwrite,
                       array_shard=opts.array_shard, spec_path=spec_path, lock=lock)
        jobs = shard_jobs(built, opts.shard_size)
        if opts.array_shard is not None:
            jobs = array_jobs(jobs, *opts.array_shard)
        todo = [j for j in jobs if not shard_done(out, j)]
        total = sum(j.stop - j.start for j in jobs)
        done_before = total - sum(j.stop - j.start for j in todo)
        _run(built, todo, out, opts, client, executors.progress(total, opts.progress, "generate", done_before))
        if opts.array_shard is None:
            return _finalize(out, built)
    finally:
        lock.release()
        restore_threads()
        if client is not None:
            executors.close_dask(client, cluster)
    return {"array_shard": list(opts.array_shard), "images": total, "made": total - done_before,
            "shards": len(jobs)}


_SAME_EVERYWHERE = ("augsplit", "numpy", "opencv", "pyarrow", "scipy", "isal", "zlib")  # the libraries that decide output bytes


def _check_worker_versions(client, scheduler: str) -> None:
    """Byte-identical output needs the same libraries on every dask worker as here."""
    try:
        theirs = client.run(mf.versions)
    except Exception as exc:  # noqa: BLE001 - e.g. augsplit not importable on a worker
        raise DatasetError(f"the dask workers cannot run augsplit: {type(exc).__name__}: {exc}", where=scheduler) from None
    mine = mf.versions()
    for worker, v in sorted(theirs.items()):
        diff = [f"{k} {v.get(k)} (here {mine[k]})" for k in _SAME_EVERYWHERE if v.get(k) != mine[k]]
        if diff:
            raise DatasetError(f"worker {worker} runs {', '.join(diff)}; byte-identical output needs the same "
                               "versions on every worker", where=scheduler)


def _run(built: Built, todo: list[ShardJob], out: Path, opts: Options, client, bar) -> None:
    with ExitStack() as stack:
        stack.callback(bar.close)
        if client is None and (opts.executor == "serial" or (opts.executor == "auto" and (opts.workers <= 1 or len(todo) <= 1))):
            # each shard's commit (a wait on the disk) overlaps the rendering of the next
            results = executors.run_serial_overlapped(lambda job: write_shard(built, job, out, opts), todo)
        else:
            key = ("generate", built.plan.settings.canonical, str(built.base_dir), str(out.resolve()),
                   json.dumps(asdict(opts)))
            stack.enter_context(executors.sharing(key, (built, out.resolve(), opts)))
            if client is None:  # the workers render and write; the driver commits while they go on
                results = executors.finish_overlapped(
                    executors.run_processes(functools.partial(_written_task, key), todo, opts.workers,
                                            lost=WrittenShard.abandon), depth=opts.workers)
            else:
                results = executors.run(functools.partial(_shard_task, key), todo, opts.workers, client=client)
        with closing(results):
            for job, count in results:
                # the driver counts a shard only once its committed part is there; its footer
                # (the row count) is read once, by `finalize`, not here as well
                part = lay.part_path(out, lay.MANIFEST_DIR, job.split, job.shard)
                if count != job.stop - job.start or not part.is_file():
                    raise DatasetError(f"shard {job} reported done but its manifest part is missing or short",
                                       where=str(part))
                bar.update(count)


def finalize(out: str | Path, built: Built | None = None) -> dict:
    """Check every shard is present, of this spec and nothing else; write dataset.json (with
    the folder locked: no job-array task may still be writing it)."""
    lock = create.FolderLock(Path(out))
    lock.take()
    try:
        return _finalize(Path(out), built)
    finally:
        lock.release()


def _finalize(out: Path, built: Built | None = None) -> dict:
    folder = open_dataset(out, allow_incomplete=True)  # parts of this spec, in the declared schema
    built = built or folder.built
    jobs = shard_jobs(built, folder.shard_size)
    # the footers open_dataset has just read: each committed part's footer is read once here
    rows = {(p.split, p.shard): p.rows for p in folder.parts_of(lay.MANIFEST_DIR)}
    missing = [(g, j) for g, j in enumerate(jobs) if rows.get((j.split, j.shard)) != j.stop - j.start]
    if missing:
        names = ", ".join(f"{j.split}/part-{j.shard:06d} (shard #{g} of {len(jobs)})" for g, j in missing[:5])
        more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
        raise DatasetError(f"{len(missing)} shard(s) missing: {names}{more}; job-array task K of N makes every "
                           f"shard # with # mod N = K; run those tasks again, or generate --resume", where=str(out))
    check_parts(folder, {s.name: s.total for s in built.plan.splits})
    create.remove_temporaries(out)  # left by killed job-array tasks; every shard is in, so none is running
    summary = {"spec_hash": built.plan.hash, "images": sum(s.total for s in built.plan.splits),
               "splits": {s.name: {"images": s.total, "role": s.role, "kind": s.kind} for s in built.plan.splits},
               "classes": list(built.plan.classes), "versions": mf.versions(), "complete": True,
               "low_visibility": low_visibility(folder)}
    _guard_disk(lambda: write_text_atomic(out / lay.SUMMARY_FILE, json.dumps(summary, indent=2, sort_keys=True)), out)
    return summary


LOW_VISIBILITY = 0.5  # an image showing less than this share of its object's footprint is reported


def low_visibility(folder, threshold: float = LOW_VISIBILITY) -> dict:
    """How many images show less than `threshold` of their target object, and how many none."""
    # part by part from the arrays' buffers: a generation run never needs pandas (0.5 s to import)
    vf = np.concatenate([np.zeros(0)] + [floats(read_column(folder, p, "visible_fraction"))
                                         for p in folder.parts_of(lay.MANIFEST_DIR)])
    return {"threshold": threshold, "below": int((vf < threshold).sum()), "zero": int((vf <= 0).sum())}

