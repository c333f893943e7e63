"""The audit's heavy per-row work on a dataset folder, and where it runs.

Each audited row needs its image's hashes (perceptual, content, DCT block) and its footprint
mask re-made from its parameters. Both are computed once per run, for every row of the splits
audited, by tasks over chunks of manifest rows (`RowChunk`), on executors.run: serially, on
local processes or on dask, with one OpenCV thread per worker. Every task reads its own rows
from the folder, so nothing but a path and row numbers travels to a worker, and returns
plain arrays that the driver places by row number: any executor gives the same cache.
`RowCache` holds the result, per split, and answers the checks' image hashes and masks.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from .. import executors
from ..errors import AugsplitError
from ..threads import opencv_threads

CHUNK_ROWS = 2048  # rows per task at most: a part larger than this is split
MASK_ERRORS = (AugsplitError, IndexError, KeyError, ValueError)  # a row too damaged to re-make


@dataclass(frozen=True)
class RowChunk:
    """Rows [lo, hi) of manifest part `part` (an index into folder.parts_of())."""

    part: int
    lo: int
    hi: int

    def __str__(self) -> str:
        return f"part {self.part} rows {self.lo}-{self.hi}"


def chunks_of(parts, wanted: set[int], size: int = CHUNK_ROWS) -> list[RowChunk]:
    return [RowChunk(k, lo, min(lo + size, p.rows)) for k, p in enumerate(parts) if k in wanted
            for lo in range(0, p.rows, size)]


class MaskUnmade(ValueError):
    """A row whose footprint could not be re-made (the worker's message, unchanged)."""


@dataclass
class ChunkResult:
    hashes: np.ndarray  # (n,) uint64
    sha: list  # n pixel sha256 hex strings
    coef: np.ndarray  # (n, 63) float16 directions of the DCT block (audit/lookalike.py)
    broken: dict  # offset in chunk -> why the stored image cannot be read
    shapes: np.ndarray  # (n, 2) int32 mask shapes, -1 where the mask could not be made
    bits: np.ndarray  # the masks' bits, packed, one after another
    unmade: dict  # offset in chunk -> why the footprint could not be made


# ---- in a worker ------------------------------------------------------------------------------

def _folder(root: str):
    """The run's opened folder: the driver's, or opened once in a fresh worker process."""
    def open_it():
        from ..dataset import open_dataset

        return open_dataset(root)

    return executors.shared(("audit", root), open_it)


def part_rows(folder, part: int, lo: int = 0, hi: int | None = None) -> list[dict]:
    """Rows [lo, hi) of a manifest part as dicts, every column (pandas' conversion: NaN for
    missing numbers, as the audit's table has them)."""
    from ..dataset.rows import iter_batches

    p = folder.parts_of()[part]
    hi = p.rows if hi is None else hi
    out, pos = [], 0
    for batch in iter_batches(folder, parts=[p], batch_rows=CHUNK_ROWS):
        a, b = max(lo - pos, 0), min(hi - pos, len(batch))
        if b > a:
            out += batch.iloc[a:b].to_dict("records")
        pos += len(batch)
        if pos >= hi:
            break
    return out


def noise_image(row: int, hw, channels: int) -> np.ndarray:
    """A stand-in for an unreadable image, drawn for its table row alone: its hashes match no
    other image, so the row cannot fake a duplicate (the image_files check fails on it)."""
    return np.random.default_rng(int(row)).integers(0, 256, (*hw, channels), dtype=np.uint8)


def chunk_task(root: str, masks: bool, job: tuple[RowChunk, np.ndarray]) -> ChunkResult:
    """Hashes (and, with `masks`, footprint masks) of one chunk; `job` is (chunk, the table row
    of each of its rows)."""
    from ..dataset.images import ImageError, image_of
    from ..render import footprint
    from ..scene import render_params
    from . import lookalike
    from .phash import fingerprint_images

    chunk, table_rows = job
    folder = _folder(root)
    built, hw, thr = folder.built, folder.hw, folder.plan.render.alpha_threshold
    rows = part_rows(folder, chunk.part, chunk.lo, chunk.hi)
    broken: dict[int, str] = {}

    def image(k: int, row: dict) -> np.ndarray:
        try:
            return image_of(folder, row)
        except ImageError as exc:
            broken[k] = exc.message
            return noise_image(table_rows[k], hw, folder.channels)

    hashes, sha, coef = fingerprint_images((image(k, r) for k, r in enumerate(rows)), coefficients=True)
    shapes = np.full((len(rows), 2), -1, np.int32)
    bits, unmade = [], {}
    for k, row in enumerate(rows if masks else ()):
        try:
            m = footprint(built.source.sprite(int(row["class_index"]), int(row["instance"])), render_params(row), hw,
                          thr).mask
        except MASK_ERRORS as exc:
            unmade[k] = str(exc)
            continue
        m = np.asarray(m, bool)
        shapes[k] = m.shape
        bits.append(np.packbits(m, axis=None))
    packed = np.concatenate(bits) if bits else np.zeros(0, np.uint8)
    return ChunkResult(hashes, list(sha), lookalike.ac_directions(coef).astype(np.float16), broken, shapes, packed,
                       unmade)


# ---- in the driver ----------------------------------------------------------------------------


class RowCache:
    """Per table row: image hashes and footprint mask, computed once per run for each split
    asked for (`ensure`), by chunk tasks on the given executor."""

    def __init__(self, folder, part_rows: list[np.ndarray], n: int, *, masks: bool = True, workers: int = 1,
                 executor: str = "auto", scheduler: str | None = None, progress: bool = False):
        self.folder, self.n, self.masks = folder, n, masks
        self.part_rows = part_rows  # per manifest part: the table row of each of its rows
        self.workers, self.executor, self.scheduler, self.progress = workers, executor, scheduler, progress
        self.hashes = np.zeros(n, np.uint64)
        self.sha = np.full(n, None, dtype=object)
        self.coef = np.zeros((n, 63), np.float16)
        self.broken: dict[int, str] = {}
        self.unmade: dict[int, str] = {}
        self.mask_shape = np.full((n, 2), -1, np.int32)
        self.mask_start = np.zeros(n, np.int64)
        self._bits: list[np.ndarray] = []
        self._bits_len = 0
        self.splits_done: set[str] = set()

    def ensure(self, splits) -> None:
        """Compute every row of these splits not computed yet (all of them in one executor run)."""
        todo = [s for s in dict.fromkeys(splits) if s not in self.splits_done]
        if not todo:
            return
        parts = self.folder.parts_of()
        wanted = {k for k, p in enumerate(parts) if p.split in todo}
        jobs = [(c, self.part_rows[c.part][c.lo: c.hi]) for c in chunks_of(parts, wanted)]
        root = str(self.folder.root.resolve())
        total = sum(c.hi - c.lo for c, _ in jobs)
        bar = executors.progress(total, self.progress, "hashing and footprints")
        dask = self.executor == "dask" or bool(self.scheduler)
        client, cluster = executors.dask_client(self.scheduler, self.workers) if dask else (None, None)
        try:
            # forked workers inherit the folder (with its built spec) and one OpenCV thread
            with opencv_threads(1), executors.sharing(("audit", root), self.folder):
                stream = executors.run(functools.partial(chunk_task, root, self.masks), jobs, self.workers,
                                       executor=self.executor, client=client)
                for (chunk, rows), res in stream:
                    self._place(rows, res)
                    bar.update(chunk.hi - chunk.lo)
        finally:
            bar.close()
            if client is not None:
                executors.close_dask(client, cluster)
        self.splits_done.update(todo)
        self._all_bits()

    def _place(self, rows: np.ndarray, res: ChunkResult) -> None:
        self.hashes[rows] = res.hashes
        self.sha[rows] = res.sha
        self.coef[rows] = res.coef
        self.broken.update({int(rows[k]): v for k, v in res.broken.items()})
        self.unmade.update({int(rows[k]): v for k, v in res.unmade.items()})
        self.mask_shape[rows] = res.shapes
        sizes = np.where(res.shapes[:, 0] >= 0, (res.shapes.prod(axis=1) + 7) // 8, 0)
        self.mask_start[rows] = self._bits_len + np.concatenate([[0], np.cumsum(sizes)[:-1]])
        self._bits.append(res.bits)
        self._bits_len += len(res.bits)

    def _all_bits(self) -> np.ndarray:
        """Every placed mask's packed bits as one array (joined once, when placed in several)."""
        if len(self._bits) != 1:
            self._bits = [np.concatenate(self._bits) if self._bits else np.zeros(0, np.uint8)]
        return self._bits[0]

    def __call__(self, row: int) -> np.ndarray:
        """The audit's mask loader: `mask`."""
        return self.mask(row)

    def pixels(self, rows, boxes, hw) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The footprint pixels of many rows at once, as footprint.row_pixels gives them for
        `mask` row by row: (made, owner, lin). made[i]: the mask of table row rows[i] was made
        and has the shape of boxes[i] (x0, y0, x1, y1, the frame it was cut in), else it is
        left out (`mask` says why); for each set pixel of the masks made that lies on the H x W
        canvas, its position i and canvas index y * W + x. Memory is a few dozen bytes per pixel
        of the masks asked for: footprint.mask_pixels asks in batches of bounded area."""
        rows, boxes = np.asarray(rows, np.int64), np.asarray(boxes, np.int64).reshape(-1, 4)
        h, w = hw
        shape = self.mask_shape[rows]
        made = (shape[:, 0] >= 0) & (shape[:, 0] == boxes[:, 3] - boxes[:, 1]) & (shape[:, 1] == boxes[:, 2] - boxes[:, 0])
        sel = np.flatnonzero(made)
        if len(sel) == 0:
            return made, np.zeros(0, np.int64), np.zeros(0, np.int64)
        n = shape[sel, 0].astype(np.int64) * shape[sel, 1]
        size = (n + 7) // 8  # bytes of each packed mask
        first = np.cumsum(size) - size  # where each starts among the bytes gathered
        bits = self._all_bits()
        taken = bits[np.repeat(self.mask_start[rows[sel]] - first, size) + np.arange(int(size.sum()))]
        on = np.flatnonzero(np.unpackbits(taken))  # packbits pads with zeros: padding is never set
        k = np.repeat(np.arange(len(sel)), 8 * size)[on]  # which mask each set bit belongs to
        y, x = np.divmod(on - 8 * first[k], shape[sel[k], 1].astype(np.int64))
        y += boxes[sel[k], 1]
        x += boxes[sel[k], 0]
        inside = (y >= 0) & (y < h) & (x >= 0) & (x < w)
        return made, sel[k[inside]], y[inside] * w + x[inside]

    def mask(self, row: int) -> np.ndarray:
        """The row's footprint mask (bool); MaskUnmade when it could not be re-made."""
        row = int(row)
        if row in self.unmade:
            raise MaskUnmade(self.unmade[row])
        h, w = (int(v) for v in self.mask_shape[row])
        if h < 0:
            raise IndexError(f"row {row} was not computed")
        bits = self._all_bits()
        s = int(self.mask_start[row])
        return np.unpackbits(bits[s: s + (h * w + 7) // 8], count=h * w).reshape(h, w).astype(bool)
