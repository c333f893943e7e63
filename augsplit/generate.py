"""Orchestration: plan -> shards -> executor -> writer; resume; job-array shards; the summary.

A split's images are cut into shards of consecutive indices. A shard writes its image files
(each atomically) and then its manifest part (atomically, streamed in row groups): the part
file is the shard's commit, so an interrupted run resumes by redoing exactly the shards
without one. Output is byte-identical whatever the number of workers, shards or executor.
"""

from __future__ import annotations

import errno
import functools
import json
import os
import shutil
from concurrent.futures import ThreadPoolExecutor
from contextlib import ExitStack, closing
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from threading import BoundedSemaphore

import cv2
import numpy as np
import pyarrow.parquet as pq

from . import executors
from . import manifest as mf
from .build import Built, build, open_spec
from .errors import DatasetError
from .io import atomic_path, write_bytes_atomic, write_text_atomic
from .limits import MAX_SHARDS_PER_SPLIT, MAX_WORKERS
from .plan.draw import draw
from .scene import make_scene, native_diameter, pixel_sha256
from .spec import canonical, parse_spec

STORES = ("files", "parquet", "none")
FORMATS = {"png": ".png", "jpeg": ".jpg", "webp": ".webp"}
# OpenCV's ranges (imgcodecs: IMWRITE_JPEG_QUALITY 0-100, IMWRITE_WEBP_QUALITY 1-100 lossy);
# PNG ignores the value, which must still be a quality a reader would recognise
QUALITY = {"png": (0, 100), "jpeg": (0, 100), "webp": (1, 100)}
EXECUTORS = executors.EXECUTORS

# A row group holds at most this many rows, and (with --store parquet) about this many bytes
# of raw pixels, so a shard of any size is rendered and written in bounded memory.
ROW_GROUP_ROWS = 1024
ROW_GROUP_BYTES = 32 << 20
WRITER_THREADS = 2  # image files are written by threads while the next image renders
WRITE_BATCH = 16  # files per thread task
WRITES_IN_FLIGHT = 64


@dataclass(frozen=True)
class Options:
    store: str = "files"
    format: str = "png"
    quality: int = 95  # JPEG / WebP quality
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


def encode(image: np.ndarray, fmt: str, quality: int) -> bytes:
    img = image[..., 0] if image.shape[2] == 1 else cv2.cvtColor(image, cv2.COLOR_RGB2BGR)
    params = {"png": [], "jpeg": [cv2.IMWRITE_JPEG_QUALITY, quality], "webp": [cv2.IMWRITE_WEBP_QUALITY, quality]}[fmt]
    ok, buf = cv2.imencode(FORMATS[fmt], img, params)
    if not ok:
        raise DatasetError(f"OpenCV could not encode a {fmt} image")
    return buf.tobytes()


def decode(data: bytes, channels: int) -> np.ndarray:
    img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_GRAYSCALE if channels == 1 else cv2.IMREAD_COLOR)
    if img is None:
        raise DatasetError("cannot decode image bytes")
    return img[..., None] if channels == 1 else cv2.cvtColor(img, cv2.COLOR_BGR2RGB)


def image_relpath(split: str, image_id: str, fmt: str) -> str:
    return f"{mf.IMAGES_DIR}/{split}/{image_id}{FORMATS[fmt]}"


def rows_per_group(built: Built, opts: Options) -> int:
    if opts.store != "parquet":
        return ROW_GROUP_ROWS
    c = built.spec.canvas
    raw = c.width * c.height * (1 if c.mode == "gray" else 3)
    return int(max(1, min(ROW_GROUP_ROWS, ROW_GROUP_BYTES // raw)))


# ---- one shard ---------------------------------------------------------------------------------


class _FileWriter:
    """Atomic image-file writes on a few threads, so file-system latency overlaps rendering.
    Files go to the threads in batches (a future per file costs more than a fast write); at
    most WRITES_IN_FLIGHT encoded images wait in memory; `close` re-raises the first error."""

    def __init__(self):
        self._pool = ThreadPoolExecutor(WRITER_THREADS, thread_name_prefix="augsplit-write")
        self._slots = BoundedSemaphore(WRITES_IN_FLIGHT // WRITE_BATCH)
        self._futures = []
        self._batch: list[tuple[Path, bytes]] = []

    def write(self, path: Path, data: bytes) -> None:
        self._batch.append((path, data))
        if len(self._batch) >= WRITE_BATCH:
            self._flush()

    def _flush(self) -> None:
        if not self._batch:
            return
        self._slots.acquire()
        fut = self._pool.submit(_write_files, self._batch)
        fut.add_done_callback(lambda _f: self._slots.release())
        self._batch = []
        self._futures = [f for f in self._futures if not f.done() or f.exception() is not None] + [fut]
        for f in self._futures:
            if f.done() and f.exception() is not None:
                raise f.exception()

    def close(self) -> None:
        """Write what is left, wait for every write; raise the first failure."""
        self._flush()
        self._pool.shutdown(wait=True)
        for f in self._futures:
            f.result()

    def abort(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)


def make_shard(built: Built, job: ShardJob, out: Path, opts: Options) -> int:
    """Render, store and commit one shard. Returns the number of images.

    Rows are rendered and written one row group at a time (memory stays flat however large
    the shard); image files are written before the manifest part, whose rename commits."""
    plan, spec = built.plan, built.spec
    split = plan.split(job.split)
    meta = mf.file_metadata(canonical(spec), plan.hash)
    step = rows_per_group(built, opts)
    part = mf.part_path(out, mf.MANIFEST_DIR, job.split, job.shard)
    dpart = mf.part_path(out, mf.DISTRACTOR_DIR, job.split, job.shard)
    files = _FileWriter() if opts.store == "files" else None
    if files is not None:
        _guard_disk(lambda: (out / mf.IMAGES_DIR / job.split).mkdir(parents=True, exist_ok=True), out)
    with ExitStack() as stack:
        _guard_disk(lambda: part.parent.mkdir(parents=True, exist_ok=True), out)
        tmp = stack.enter_context(atomic_path(part))
        writer = stack.enter_context(pq.ParquetWriter(tmp, mf.IMAGE_SCHEMA.with_metadata(meta), compression="zstd"))
        dwriter = dtmp = None
        try:
            for lo in range(job.start, job.stop, step):
                cols, dcols = _render_rows(built, split, job, np.arange(lo, min(lo + step, job.stop)), out, opts, files)
                _guard_disk(lambda: writer.write_table(mf.to_table(cols, mf.IMAGE_SCHEMA, meta)), part)
                if dcols:
                    if dwriter is None:
                        _guard_disk(lambda: dpart.parent.mkdir(parents=True, exist_ok=True), out)
                        dtmp = stack.enter_context(atomic_path(dpart))
                        dwriter = pq.ParquetWriter(dtmp, mf.DISTRACTOR_SCHEMA.with_metadata(meta), compression="zstd")
                        stack.callback(dwriter.close)  # runs before dtmp's rename (LIFO)
                    _guard_disk(lambda: dwriter.write_table(mf.to_table(dcols, mf.DISTRACTOR_SCHEMA, meta)), dpart)
            if files is not None:
                files.close()
        except BaseException:
            if files is not None:
                files.abort()
            raise
        # Closing the stack closes the writers and renames: the distractor part first (entered
        # later, left earlier), then the manifest part, whose presence is the shard's commit.
        _guard_disk(stack.close, part)
    return job.stop - job.start


def _render_rows(built: Built, split, job: ShardJob, indices: np.ndarray, out: Path, opts: Options, files):
    """Image and distractor columns for some consecutive image indices of one shard."""
    plan, spec = built.plan, built.spec
    cols = draw(plan, split, indices)
    n = len(indices)
    thr = spec.render.alpha_threshold
    names = list(cols)
    values = zip(*(cols[k].tolist() for k in names))  # plain Python scalars: cheap per-row access
    bbox = np.zeros((n, 4), dtype=np.int64)
    footprint_px = np.zeros(n, dtype=np.int64)
    visible = np.zeros(n, dtype=np.float64)
    n_dist = np.zeros(n, dtype=np.int64)
    size_px = np.zeros(n, dtype=np.float64)
    ids, file_col, data_col, sums = [], [], [], []
    dist_rows: list[dict] = []
    for r, vals in enumerate(values):
        row = dict(zip(names, vals))
        image_id = f"{job.split}-{row['index']:07d}"
        scene = make_scene(plan, built.source, built.background, split, row)
        t = scene.target
        bbox[r] = t.bbox
        footprint_px[r] = t.footprint_px
        visible[r] = t.visible_fraction
        n_dist[r] = len(scene.distractors)
        sums.append(pixel_sha256(scene.image))
        sprite = built.source.sprite(row["class_index"], row["instance"])
        size_px[r] = native_diameter(sprite, thr) * float(row["scale"])
        ids.append(image_id)
        data = encode(scene.image, opts.format, opts.quality) if opts.store != "none" else None
        if files is not None:
            rel = image_relpath(job.split, image_id, opts.format)
            files.write(out / rel, data)
            file_col.append(rel)
            data_col.append(None)
        else:
            file_col.append("")
            data_col.append(data)
        for d in scene.distractors:
            dist_rows.append({"image_id": image_id, **d})
    cols.update(image_id=ids, bbox_x0=bbox[:, 0], bbox_y0=bbox[:, 1], bbox_x1=bbox[:, 2], bbox_y1=bbox[:, 3],
                footprint_px=footprint_px, visible_fraction=visible, n_distractors=n_dist, file=file_col,
                image_bytes=data_col, sha256=sums, size_px=size_px, split_index=np.full(n, job.split_index),
                seed=np.full(n, spec.seed), width=np.full(n, spec.canvas.width),
                height=np.full(n, spec.canvas.height))
    if plan.canvas.viewing is not None:
        cols["size_deg"] = plan.canvas.viewing.size_to_deg(size_px)
    else:
        cols["size_deg"] = np.full(n, np.nan)
    dcols = {k: [d[k] for d in dist_rows] for k in dist_rows[0]} if dist_rows else None
    return cols, dcols


def _write_file(path: Path, data: bytes) -> None:
    _guard_disk(lambda: write_bytes_atomic(path, data), path)


def _write_files(batch: list[tuple[Path, bytes]]) -> None:
    for path, data in batch:
        _write_file(path, data)


# errno values that mean "the storage cannot take more", whatever the file
_FULL = {errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC), errno.EFBIG}


def _guard_disk(fn, where: Path):
    """Run a write; turn the OSErrors storage raises into one-line DatasetErrors."""
    try:
        return fn()
    except DatasetError:
        raise
    except OSError as exc:
        place = str(exc.filename or where)
        if exc.errno in _FULL:
            raise DatasetError("disk full; completed shards are kept; free space and rerun with --resume",
                               where=place) from None
        if isinstance(exc, PermissionError):
            raise DatasetError("permission denied", where=place) from None
        if exc.errno == errno.EROFS:
            raise DatasetError("read-only file system", where=place) from None
        raise DatasetError(f"cannot write: {exc.strerror or exc}", where=place) from None


# ---- worker plumbing: each process builds the spec once ------------------------------------


@functools.lru_cache(maxsize=4)
def _worker_state(spec_json: str, base_dir: str, out: str, opts_json: str) -> tuple[Built, Path, Options]:
    opts = json.loads(opts_json)
    # One OpenCV thread, as in the driver. A pool worker forked from the driver inherits it,
    # and must not touch OpenCV's pool: that can wait forever on parent threads a fork does
    # not copy (seen in the benchmark). A dask worker is a fresh process and sets it.
    if opts.get("executor") == "dask" or opts.get("scheduler"):
        cv2.setNumThreads(1)
    if opts.get("array_shard") is not None:
        opts["array_shard"] = tuple(opts["array_shard"])
    return build(parse_spec(json.loads(spec_json)), Path(base_dir)), Path(out), Options(**opts)


def _shard_task(state_key: tuple, job: ShardJob) -> int:
    """The task every executor runs: (re)build the spec once per process, make one shard."""
    built, out, opts = _worker_state(*state_key)
    return make_shard(built, job, out, opts)


# ---- the output folder ----------------------------------------------------------------------

_LAYOUT_KEYS = ("shard_size", "store", "format", "quality")
_DATASET_ENTRIES = {mf.SPEC_FILE, mf.SUMMARY_FILE, mf.MANIFEST_DIR, mf.DISTRACTOR_DIR, mf.IMAGES_DIR}


def _layout(opts: Options) -> dict:
    """The options that decide the bytes on disk: a resumed run or a job-array peer must share them."""
    return {k: getattr(opts, k) for k in _LAYOUT_KEYS}


def prepare_out(out: Path, built: Built, opts: Options) -> None:
    """Create or reopen the output folder; refuse to clobber anything without --overwrite."""
    if out.exists() and not out.is_dir():
        raise DatasetError("the output path is a file, not a folder", where=str(out))
    if opts.array_shard is not None and opts.overwrite:
        raise DatasetError("--overwrite cannot be combined with --shard: each job of the array would delete the "
                           "others' work; remove the folder once, then submit the array", where=str(out))
    if out.exists() and any(out.iterdir()):
        if opts.overwrite:
            if not (out / mf.SPEC_FILE).exists() and not (out / mf.MANIFEST_DIR).exists():
                raise DatasetError("refusing to overwrite a folder that is not an augsplit dataset", where=str(out))
            try:
                shutil.rmtree(out)
            except OSError as exc:
                raise DatasetError(f"cannot remove the old dataset: {exc.strerror}", where=str(exc.filename or out)) from None
        elif opts.resume or opts.array_shard is not None:
            _check_same_dataset(out, built, opts)
            if opts.array_shard is None:
                # only a whole-run resume may sweep temporaries: job-array peers may be writing now
                _remove_temporaries(out)
        else:
            raise DatasetError("the output folder exists and is not empty; use --resume to continue it "
                               "or --overwrite to replace it", where=str(out))
    try:
        out.mkdir(parents=True, exist_ok=True)
        spec_file = out / mf.SPEC_FILE
        if not spec_file.exists():
            # the spec in its own key order: the order of splits and axes is part of every
            # image's seed key and of its draws, so a sorted copy would re-make other images
            doc = {"spec_hash": built.plan.hash, "base_dir": str(built.base_dir.resolve()),
                   "layout": _layout(opts), "spec": built.spec.model_dump(mode="json")}
            write_text_atomic(spec_file, json.dumps(doc, indent=2))
    except PermissionError as exc:
        raise DatasetError("permission denied", where=str(exc.filename or out)) from None
    except OSError as exc:
        raise DatasetError(f"cannot create the output folder: {exc.strerror}", where=str(exc.filename or out)) from None


def _check_same_dataset(out: Path, built: Built, opts: Options) -> None:
    spec_file = out / mf.SPEC_FILE
    if not spec_file.exists():
        # a job-array peer may have made the folder a moment ago and not yet renamed spec.json in
        strangers = [p.name for p in out.iterdir()
                     if p.name not in _DATASET_ENTRIES and not p.name.startswith(f".{mf.SPEC_FILE}.tmp-")]
        if opts.array_shard is None or strangers:
            raise DatasetError("the folder is not empty and holds no augsplit dataset to resume", where=str(out))
        return
    try:
        old = json.loads(spec_file.read_text())
    except (OSError, ValueError) as exc:
        raise DatasetError(f"unreadable spec.json: {exc}", where=str(spec_file)) from None
    if old.get("spec_hash") != built.plan.hash:
        raise DatasetError(f"the folder holds a dataset of another spec (hash {old.get('spec_hash')}); "
                           f"this spec's hash is {built.plan.hash}", where=str(out))
    layout = old.get("layout")
    if layout and layout != _layout(opts):
        want = " ".join(f"--{k.replace('_', '-')} {layout[k]}" for k in _LAYOUT_KEYS if layout.get(k) != getattr(opts, k))
        raise DatasetError(f"the folder was started with other storage options; rerun with {want}", where=str(out))


def _remove_temporaries(out: Path) -> None:
    for tmp in out.rglob(".*.tmp-*"):
        tmp.unlink(missing_ok=True)


def shard_done(out: Path, job: ShardJob) -> bool:
    p = mf.part_path(out, mf.MANIFEST_DIR, job.split, job.shard)
    if not p.exists():
        return False
    try:
        return pq.ParquetFile(p).metadata.num_rows == job.stop - job.start
    except Exception:  # noqa: BLE001 - an unreadable part is simply redone
        p.unlink(missing_ok=True)
        return False


# ---- the whole run -------------------------------------------------------------------------


def _check_options(opts: Options) -> None:
    if opts.store not in STORES:
        raise DatasetError(f"unknown store '{opts.store}'; use one of {', '.join(STORES)}")
    if opts.format not in FORMATS:
        raise DatasetError(f"unknown image format '{opts.format}'; use one of {', '.join(FORMATS)}")
    if opts.executor not in EXECUTORS:
        raise DatasetError(f"unknown executor '{opts.executor}'; use one of {', '.join(EXECUTORS)}")
    if opts.shard_size < 1:
        raise DatasetError(f"shard size must be at least 1, got {opts.shard_size}", where="--shard-size")
    if opts.workers < 1:
        raise DatasetError(f"workers must be at least 1, got {opts.workers}", where="--workers")
    if opts.force_workers and opts.workers > MAX_WORKERS:
        raise DatasetError(f"{opts.workers} workers are above the limit of {MAX_WORKERS} even when forced "
                           "(limits.MAX_WORKERS)", where="--workers")
    lo, hi = QUALITY[opts.format]
    if not lo <= opts.quality <= hi:
        raise DatasetError(f"quality must lie in {lo}..{hi} for {opts.format}, got {opts.quality}", where="--quality")
    if opts.array_shard is not None:
        k, n = opts.array_shard
        if n < 1 or not 0 <= k < n:
            raise DatasetError(f"shard {k}/{n}: K must lie in 0..{max(n - 1, 0)} and N be at least 1",
                               where="--shard")


def usable_workers(opts: Options, n_shards: int) -> int:
    """Worker processes worth starting: more than the shards or the CPU cores only slow a run
    down and cost memory, unless `force_workers` (for a remote scheduler the count is unused)."""
    if opts.force_workers:
        return opts.workers
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(1, min(opts.workers, n_shards, cores))


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
    _check_options(opts)
    built = built or open_spec(spec_path)
    opts = _check_shards(built, opts)
    out = Path(out)
    dask = opts.executor == "dask" or bool(opts.scheduler)
    # connect first: an unreachable scheduler must fail before the output folder is touched
    client, cluster = executors.dask_client(opts.scheduler, opts.workers) if dask else (None, None)
    # OpenCV's own thread pool gains nothing on per-object boxes this small but spins a second
    # core (measured: 2x the CPU per image, same wall time); pool workers forked from here
    # inherit the setting. Same pixels either way. Restored when the run ends.
    cv_threads = cv2.getNumThreads()
    cv2.setNumThreads(1)
    try:
        if opts.scheduler:
            _check_worker_versions(client, opts.scheduler)
        prepare_out(out, built, opts)
        jobs = shard_jobs(built, opts.shard_size)
        if opts.array_shard is not None:
            jobs = array_jobs(jobs, *opts.array_shard)
        todo = [j for j in jobs if not shard_done(out, j)]
        total = sum(j.stop - j.start for j in jobs)
        done_before = total - sum(j.stop - j.start for j in todo)
        _run(built, todo, out, opts, client, _progress(total, done_before, opts.progress))
    finally:
        cv2.setNumThreads(cv_threads)
        if client is not None:
            executors.close_dask(client, cluster)
    if opts.array_shard is not None:
        return {"array_shard": list(opts.array_shard), "images": total, "made": total - done_before,
                "shards": len(jobs)}
    return finalize(out, built)


_SAME_EVERYWHERE = ("augsplit", "numpy", "opencv", "pyarrow")  # the libraries that decide output bytes


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
    try:
        if client is None and (opts.executor == "serial" or (opts.executor == "auto" and (opts.workers <= 1 or len(todo) <= 1))):
            results = ((job, make_shard(built, job, out, opts)) for job in todo)
        else:
            key = (json.dumps(built.spec.model_dump(mode="json")), str(built.base_dir), str(out.resolve()),
                   json.dumps(asdict(opts)))
            results = executors.run(functools.partial(_shard_task, key), todo, opts.workers,
                                    executor=opts.executor, client=client)
        with closing(results):
            for job, count in results:
                # the driver counts a shard only once its committed part is there in full
                if not shard_done(out, job):
                    raise DatasetError(f"shard {job} reported done but its manifest part is missing or short",
                                       where=str(out))
                bar.update(count)
    finally:
        bar.close()


def finalize(out: str | Path, built: Built | None = None) -> dict:
    """Check every shard is present, of this spec and nothing else; write dataset.json."""
    out = Path(out)
    built = built or open_dataset_spec(out)
    jobs = shard_jobs(built, _shard_size_of(out, built))
    missing = [(g, j) for g, j in enumerate(jobs) if not shard_done(out, j)]
    if missing:
        names = ", ".join(f"{j.split}/part-{j.shard:06d} (shard #{g} of {len(jobs)})" for g, j in missing[:5])
        more = f" and {len(missing) - 5} more" if len(missing) > 5 else ""
        raise DatasetError(f"{len(missing)} shard(s) missing: {names}{more}; job-array task K of N makes every "
                           f"shard # with # mod N = K; run those tasks again, or generate --resume", where=str(out))
    expected = {mf.part_path(out, mf.MANIFEST_DIR, j.split, j.shard) for j in jobs}
    for f in mf.part_files(out) + mf.part_files(out, mf.DISTRACTOR_DIR):
        if f.parent.parent.name == mf.MANIFEST_DIR and f not in expected:
            raise DatasetError("a manifest part that no shard of this spec makes (another shard size or spec?)",
                               where=str(f))
        try:
            got = (pq.read_schema(f).metadata or {}).get(mf.META_HASH, b"").decode()
        except Exception as exc:  # noqa: BLE001 - any unreadable part is reported as such
            raise DatasetError(f"unreadable Parquet part: {exc}", where=str(f)) from None
        if got != built.plan.hash:
            raise DatasetError(f"this part was made from another spec (hash {got or 'none'}; the folder's spec "
                               f"is {built.plan.hash}); shards of different specs cannot be mixed", where=str(f))
    _remove_temporaries(out)  # left by killed job-array tasks; every shard is in, so none is running
    summary = {"spec_hash": built.plan.hash, "images": sum(s.total for s in built.plan.splits),
               "splits": {s.name: {"images": s.total, "role": s.role, "kind": s.kind} for s in built.plan.splits},
               "classes": list(built.plan.classes), "versions": mf.versions(), "complete": True}
    _guard_disk(lambda: write_text_atomic(out / mf.SUMMARY_FILE, json.dumps(summary, indent=2, sort_keys=True)), out)
    return summary


def open_dataset_spec(out: str | Path) -> Built:
    """The Built (spec, source, background, plan) a dataset folder was made from."""
    out = Path(out)
    spec_file = out / mf.SPEC_FILE
    if not out.is_dir():
        raise DatasetError("no such dataset folder", where=str(out))
    if not spec_file.exists():
        raise DatasetError("not an augsplit dataset (no spec.json)", where=str(out))
    try:
        doc = json.loads(spec_file.read_text())
        spec = parse_spec(doc["spec"], source=str(spec_file))
    except (ValueError, KeyError) as exc:
        raise DatasetError(f"unreadable spec.json: {exc}", where=str(spec_file)) from None
    built = build(spec, Path(doc.get("base_dir", out)))
    if built.plan.hash != doc.get("spec_hash"):
        raise DatasetError(f"spec.json says hash {doc.get('spec_hash')} but its spec hashes to {built.plan.hash}",
                           where=str(spec_file))
    return built


def _shard_size_of(out: Path, built: Built) -> int:
    try:
        layout = json.loads((out / mf.SPEC_FILE).read_text()).get("layout") or {}
    except (OSError, ValueError):
        layout = {}
    if layout.get("shard_size"):
        return int(layout["shard_size"])
    # folders from before the layout was recorded: the largest first part is a whole shard
    files = mf.part_files(out)
    if not files:
        return Options().shard_size
    first = min(files, key=lambda p: (p.parent.name, p.name))
    sizes = [pq.ParquetFile(f).metadata.num_rows for f in files if f.name == "part-000000.parquet"]
    return max(sizes) if sizes else pq.ParquetFile(first).metadata.num_rows


class _NoBar:
    def update(self, n):
        pass

    def close(self):
        pass


def _progress(total: int, initial: int, enabled: bool):
    import sys

    if not enabled or not sys.stderr.isatty():
        return _NoBar()
    from tqdm import tqdm

    return tqdm(total=total, initial=initial, unit="img", desc="generate")
