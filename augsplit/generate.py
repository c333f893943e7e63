"""Orchestration: plan -> shards -> executor -> writer; resume; the dataset summary.

A split's images are cut into shards of consecutive indices. A shard writes its image files
(each atomically) and then its manifest part (atomically): the part file is the shard's
commit, so an interrupted run resumes by redoing exactly the shards without one. Output is
byte-identical whatever the number of workers, shards or executor.
"""

from __future__ import annotations

import errno
import json
import shutil
from dataclasses import asdict, dataclass
from pathlib import Path

import cv2
import numpy as np
import pyarrow.parquet as pq

from . import manifest as mf
from .build import Built, build, open_spec
from .errors import DatasetError
from .io import write_text_atomic
from .plan.draw import draw
from .scene import make_scene, native_diameter, pixel_sha256
from .spec import canonical, parse_spec

STORES = ("files", "parquet", "none")
FORMATS = {"png": ".png", "jpeg": ".jpg", "webp": ".webp"}


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


@dataclass(frozen=True)
class ShardJob:
    split: str
    split_index: int
    shard: int
    start: int
    stop: int


def shard_jobs(built: Built, shard_size: int) -> list[ShardJob]:
    jobs = []
    for s in built.plan.splits:
        for k, start in enumerate(range(0, s.total, shard_size)):
            jobs.append(ShardJob(s.name, s.index, k, start, min(start + shard_size, s.total)))
    return jobs


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


def make_shard(built: Built, job: ShardJob, out: Path, opts: Options) -> int:
    """Render, store and commit one shard. Returns the number of images."""
    plan, spec = built.plan, built.spec
    split = plan.split(job.split)
    cols = draw(plan, split, np.arange(job.start, job.stop))
    n = job.stop - job.start
    thr = spec.render.alpha_threshold
    extra = {k: [] for k in ("image_id", "bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1", "footprint_px",
                             "visible_fraction", "n_distractors", "file", "image_bytes", "sha256", "size_px")}
    dist_rows: list[dict] = []
    img_dir = out / mf.IMAGES_DIR / job.split
    if opts.store == "files":
        img_dir.mkdir(parents=True, exist_ok=True)
    for r in range(n):
        row = {k: v[r] for k, v in cols.items()}
        image_id = f"{job.split}-{int(row['index']):07d}"
        scene = make_scene(plan, built.source, built.background, split, row)
        t = scene.target
        for key, val in zip(("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"), t.bbox):
            extra[key].append(val)
        extra["image_id"].append(image_id)
        extra["footprint_px"].append(t.footprint_px)
        extra["visible_fraction"].append(t.visible_fraction)
        extra["n_distractors"].append(len(scene.distractors))
        extra["sha256"].append(pixel_sha256(scene.image))
        sprite = built.source.sprite(int(row["class_index"]), int(row["instance"]))
        extra["size_px"].append(native_diameter(sprite, thr) * float(row["scale"]))
        data = encode(scene.image, opts.format, opts.quality) if opts.store != "none" else None
        if opts.store == "files":
            rel = image_relpath(job.split, image_id, opts.format)
            _write_file(out / rel, data)
            extra["file"].append(rel)
            extra["image_bytes"].append(None)
        else:
            extra["file"].append("")
            extra["image_bytes"].append(data)
        for d in scene.distractors:
            dist_rows.append({"image_id": image_id, **d})
    columns = dict(cols)
    columns.update(extra)
    columns.update(split_index=np.full(n, job.split_index), seed=np.full(n, spec.seed),
                   width=np.full(n, spec.canvas.width), height=np.full(n, spec.canvas.height))
    if plan.canvas.viewing is not None:
        columns["size_deg"] = plan.canvas.viewing.size_to_deg(np.asarray(extra["size_px"]))
    else:
        columns["size_deg"] = np.full(n, np.nan)
    meta = mf.file_metadata(canonical(spec), plan.hash)
    if dist_rows:
        dcols = {k: [d[k] for d in dist_rows] for k in dist_rows[0]}
        _guard_disk(lambda: mf.write_part(mf.part_path(out, mf.DISTRACTOR_DIR, job.split, job.shard),
                                          mf.to_table(dcols, mf.DISTRACTOR_SCHEMA, meta)), out)
    # the manifest part last: its presence is the shard's commit
    _guard_disk(lambda: mf.write_part(mf.part_path(out, mf.MANIFEST_DIR, job.split, job.shard),
                                      mf.to_table(columns, mf.IMAGE_SCHEMA, meta)), out)
    return n


def _write_file(path: Path, data: bytes) -> None:
    from .io import write_bytes_atomic

    _guard_disk(lambda: write_bytes_atomic(path, data), path)


def _guard_disk(fn, where: Path):
    try:
        return fn()
    except OSError as exc:
        if exc.errno == errno.ENOSPC:
            raise DatasetError("disk full; completed shards are kept; free space and rerun with --resume",
                               where=str(where)) from None
        if isinstance(exc, PermissionError):
            raise DatasetError("permission denied", where=str(exc.filename or where)) from None
        raise


# ---- worker plumbing: each process builds the spec once ---------------------------------

_WORKER: dict = {}


def _init_worker(spec_json: str, base_dir: str, out: str, opts: dict) -> None:
    _WORKER["built"] = build(parse_spec(json.loads(spec_json)), Path(base_dir))
    _WORKER["out"] = Path(out)
    _WORKER["opts"] = Options(**opts)


def _worker_task(job: ShardJob) -> int:
    return make_shard(_WORKER["built"], job, _WORKER["out"], _WORKER["opts"])


# ---- the whole run -------------------------------------------------------------------------


def prepare_out(out: Path, built: Built, opts: Options) -> None:
    """Create or reopen the output folder; refuse to clobber anything without --overwrite."""
    if out.exists() and not out.is_dir():
        raise DatasetError("the output path is a file, not a folder", where=str(out))
    if out.exists() and any(out.iterdir()):
        if opts.overwrite:
            if not (out / mf.SPEC_FILE).exists() and not (out / mf.MANIFEST_DIR).exists():
                raise DatasetError("refusing to overwrite a folder that is not an augsplit dataset", where=str(out))
            shutil.rmtree(out)
        elif opts.resume or opts.array_shard:
            spec_file = out / mf.SPEC_FILE
            if not spec_file.exists():
                raise DatasetError("the folder is not empty and holds no augsplit dataset to resume", where=str(out))
            old = json.loads(spec_file.read_text())
            if old.get("spec_hash") != built.plan.hash:
                raise DatasetError(f"the folder holds a dataset of another spec (hash {old.get('spec_hash')}); "
                                   f"this spec's hash is {built.plan.hash}", where=str(out))
            _remove_temporaries(out)
        else:
            raise DatasetError("the output folder exists and is not empty; use --resume to continue it "
                               "or --overwrite to replace it", where=str(out))
    try:
        out.mkdir(parents=True, exist_ok=True)
        spec_file = out / mf.SPEC_FILE
        if not spec_file.exists():
            write_text_atomic(spec_file, json.dumps({"spec_hash": built.plan.hash, "base_dir": str(built.base_dir.resolve()),
                                                     "spec": json.loads(canonical(built.spec))}, indent=2, sort_keys=True))
    except PermissionError as exc:
        raise DatasetError("permission denied", where=str(exc.filename or out)) from None
    except OSError as exc:
        raise DatasetError(f"cannot create the output folder: {exc.strerror}", where=str(out)) from None


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


def generate(spec_path: str | Path | None, out: str | Path, opts: Options = Options(), built: Built | None = None) -> dict:
    """Make (or resume, or finish one job-array shard of) the dataset; returns the summary."""
    built = built or open_spec(spec_path)
    out = Path(out)
    if opts.store not in STORES:
        raise DatasetError(f"unknown store '{opts.store}'; use one of {', '.join(STORES)}")
    if opts.format not in FORMATS:
        raise DatasetError(f"unknown image format '{opts.format}'; use one of {', '.join(FORMATS)}")
    prepare_out(out, built, opts)
    jobs = shard_jobs(built, opts.shard_size)
    if opts.array_shard is not None:
        k, n = opts.array_shard
        jobs = [j for i, j in enumerate(jobs) if i % n == k]
    todo = [j for j in jobs if not shard_done(out, j)]
    total = sum(j.stop - j.start for j in jobs)
    done_before = total - sum(j.stop - j.start for j in todo)
    from . import executors

    bar = _progress(total, done_before, opts.progress)
    initargs = (json.dumps(built.spec.model_dump(mode="json")), str(built.base_dir), str(out), asdict(opts))
    try:
        if opts.workers <= 1:
            for job in todo:
                bar.update(make_shard(built, job, out, opts))
        else:
            for _job, count in executors.run(_worker_task, todo, opts.workers, _init_worker, initargs):
                bar.update(count)
    finally:
        bar.close()
    if opts.array_shard is not None:
        return {"array_shard": list(opts.array_shard), "images": total, "made": total - done_before}
    return finalize(out, built)


def finalize(out: str | Path, built: Built | None = None) -> dict:
    """Check every shard is present and write dataset.json (the dataset's summary)."""
    out = Path(out)
    built = built or open_dataset_spec(out)
    jobs = shard_jobs(built, _shard_size_of(out, built))
    missing = [j for j in jobs if not shard_done(out, j)]
    if missing:
        names = ", ".join(f"{j.split}/part-{j.shard:06d}" for j in missing[:5])
        raise DatasetError(f"{len(missing)} shard(s) missing, e.g. {names}; run the missing job-array shards "
                           f"or generate --resume", where=str(out))
    summary = {"spec_hash": built.plan.hash, "images": sum(s.total for s in built.plan.splits),
               "splits": {s.name: {"images": s.total, "role": s.role, "kind": s.kind} for s in built.plan.splits},
               "classes": list(built.plan.classes), "versions": mf.versions(), "complete": True}
    write_text_atomic(out / mf.SUMMARY_FILE, json.dumps(summary, indent=2, sort_keys=True))
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
