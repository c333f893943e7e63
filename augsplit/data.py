"""Loaders: a map-style dataset over a generated dataset folder, and the on-the-fly sampler.

`Dataset(root, split)` gives item i of a split — image, the chosen target and the manifest row
— from image files, Parquet bytes or by re-rendering the row (`store none`); `OnlineSampler`
draws fresh parameters from a split's region for every item, deterministic given (seed, epoch,
index). Both are plain Python objects (len, [], iter) that torch's DataLoader or any other
loader accepts; each process opens files and builds caches for itself.
"""

from __future__ import annotations

import difflib
import functools
import os
from collections import OrderedDict
from pathlib import Path
from typing import Callable, Iterable, Iterator, Sequence

import numpy as np
import pandas as pd

from . import manifest as mf
from .build import Built, open_spec
from .dataset import images, open_dataset, rows
from .epoch import SharedEpoch
from .errors import DatasetError
from .item_transform import bound
from .plan.draw import draw_online
from .render import Placed, footprint
from .reprs import Shown, made_repr
from .manifest import pixel_sha256
from .scene import make_scene, render_params
from .space.streams import PARAMS, RENDER, LazyStream, online_rng
from .threads import one_opencv_thread_in_workers

TARGETS = ("class", "params", "bbox", "mask")
BBOX_COLUMNS = ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1")
# Columns an item's `row` carries: every manifest column but the encoded image itself.
ROW_COLUMNS = tuple(c.name for c in mf.IMAGE_COLUMNS if c.name != "image_bytes")


class DatasetIndexError(DatasetError, IndexError):
    """An item index out of range: a DatasetError, and an IndexError for Python's protocols."""


# ---- shared helpers -------------------------------------------------------------------------


def _check_target(target, columns: Sequence[str], where: str):
    names = target if isinstance(target, tuple) else (target,)
    if not names:
        raise DatasetError("target is an empty tuple; name at least one of " + ", ".join(TARGETS), where=where)
    for t in names:
        if not isinstance(t, str) or (t not in TARGETS and t not in columns):
            close = difflib.get_close_matches(str(t), list(TARGETS) + list(columns), n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise DatasetError(f"unknown target {t!r}{hint}; use {', '.join(TARGETS)}, a manifest column, "
                               "or a tuple of these", where=where)
    return names


def param_names(built: Built) -> tuple[str, ...]:
    """The axes a spec varies, in the manifest's column order (not the spec's key order,
    which a spec re-read from a dataset's spec.json does not keep): the 'params' target."""
    space = built.plan.space
    return tuple(n for n in mf.AXIS_COLUMNS if n in space)


def _target_mask(placed: Placed, hw: tuple[int, int]) -> np.ndarray:
    out = np.zeros(hw, dtype=np.uint8)
    x0, y0, x1, y1 = placed.bbox
    if placed.footprint_px:
        out[y0:y1, x0:x1] = placed.mask
    return out


def _settable(loader) -> dict:
    """A loader's constructor arguments kept as attributes the user may change: their values now."""
    return {"chw_float": loader.chw_float, "transform": loader.transform, "transform_kind": loader.transform_kind}


def _targets(names, row: dict, params: tuple[str, ...], mask_fn):
    out = []
    for t in names:
        if t == "class":
            out.append(int(row["class_index"]))
        elif t == "params":
            out.append(np.array([row[n] for n in params], dtype=np.float32))
        elif t == "bbox":
            out.append(np.array([row[k] for k in BBOX_COLUMNS], dtype=np.float32))
        elif t == "mask":
            out.append(mask_fn())
        else:
            out.append(row[t])
    return out[0] if len(out) == 1 else tuple(out)


# ---- map-style dataset over a generated folder -----------------------------------------------


class Dataset:
    """Items of one split of a generated dataset folder.

    Item i is a dict: ``image`` (H, W, C) uint8 RGB or grey (C = 1) — or (C, H, W) float32 in
    [0, 1] with ``chw_float=True`` —, ``target`` (see below) and ``row`` (the manifest row as a
    dict of plain values, without the encoded image). Targets: ``'class'`` (class index, int),
    ``'params'`` (float32 vector of the spec's axes in manifest column order: ``self.param_names``,
    spec units; angle and hue in raw degrees, so regress their sine and cosine if the range is
    a full circle), ``'bbox'`` (float32 [x0, y0, x1, y1], px, of the visible footprint, end exclusive),
    ``'mask'`` ((H, W) uint8, 1 on the target object's footprint — alpha above the spec's
    threshold, not reduced where a distractor covers it), any manifest column name, or a
    tuple of these (the target is then a tuple).

    Rows can be filtered by ``classes`` (names or indices), ``cells`` (the region cell each
    image was drawn from, manifest column ``cell``) and ``query`` (a pandas query over the
    manifest columns, e.g. ``"scale > 1.2 and angle < 90"``); the filters intersect.
    ``transform`` changes each item before ``chw_float``; it is called the way its library
    calls it (``transform_kind='auto'`` tells by its type; name the kind for a plain function):

    - an albumentations transform or Compose (``'albumentations'``): ``transform(image=...,
      mask=..., bboxes=...)`` with the image (H, W, C) uint8, the target mask when the target
      includes ``'mask'`` and the target box when it includes ``'bbox'`` (as pascal_voc, so
      declare ``bbox_params=A.BboxParams(format='pascal_voc')``; label fields get the class
      index); what it returns replaces them (a box it drops becomes NaN);
    - a torch module, which every torchvision v2 transform is, or another torchvision
      transform (``'tensor'``): the image as a uint8 torch tensor (C, H, W), and the tensor it
      returns becomes the image (tensor in, tensor out). Refused with a ``'mask'`` or ``'bbox'``
      target, which it would leave behind;
    - any other callable (``'item'``): the item dict, returning the item dict.

    ``chw_float=True`` then makes the image float32 (C, H, W): uint8 scaled to [0, 1], a float
    image kept as it is; a numpy image stays numpy, a tensor stays a tensor.
    ``check_pixels`` compares each image's SHA-256 with its manifest row (lossless stores).
    Items follow the split's image index, after filtering; the filtered manifest is
    ``self.manifest`` (a DataFrame, row i = item i).
    """

    def __init__(self, root: str | Path, split: str, target="class", chw_float: bool = False,
                 classes: Sequence | None = None, cells: Sequence[int] | None = None, query: str | None = None,
                 transform: Callable | None = None, check_pixels: bool = False,
                 parquet_cache: int = 4, transform_kind: str = "auto"):
        self.root = Path(root)
        where = str(self.root)
        # Only the spec's text is needed to open the dataset; its object source (which may
        # live in a folder the dataset has since moved away from) is built when an item needs it.
        self.folder = open_dataset(self.root)
        self.spec_hash, summary = self.folder.spec_hash, self.folder.summary
        have = [s for s in self.folder.splits if self.folder.parts_of(splits=[s])]
        if split not in have:
            close = difflib.get_close_matches(str(split), have, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise DatasetError(f"no split {split!r}{hint}; the dataset has {', '.join(have) or 'none'}", where=where)
        self.split = split
        self.names = _check_target(target, ROW_COLUMNS, "target")
        self.target = target
        self.chw_float = bool(chw_float)
        self.transform = transform
        self.transform_kind = transform_kind
        bound(self, "Dataset.transform")  # checked now; changed attributes are checked when next used
        self._made = {"root": root, "split": split, "target": target, "chw_float": chw_float, "classes": classes,
                      "cells": cells, "query": query, "transform": transform, "check_pixels": check_pixels,
                      "parquet_cache": parquet_cache, "transform_kind": transform_kind}  # for the repr
        self.check_pixels = bool(check_pixels)
        if isinstance(parquet_cache, bool) or not isinstance(parquet_cache, (int, np.integer)) or parquet_cache < 1:
            raise DatasetError(f"parquet_cache is how many Parquet parts to keep open, a whole number >= 1; got "
                               f"{parquet_cache!r}", where="parquet_cache")
        self.parquet_cache = int(parquet_cache)
        self.classes = tuple(summary.get("classes") or ())
        names = set(self.folder.axis_names) | ({"polar_angle"} if "eccentricity" in self.folder.axis_names else set())
        self.param_names = tuple(n for n in mf.AXIS_COLUMNS if n in names)
        self.channels = self.folder.channels
        self.hw = self.folder.hw
        self.threshold = self.folder.settings.render.alpha_threshold

        self.parts = self.folder.parts_of(splits=[split])
        frame = rows.read_rows(self.folder, splits=[split], columns=ROW_COLUMNS, positions=True)
        frame["file"] = frame["file"].fillna("")
        has_bytes = [rows.non_null(self.folder, p, "image_bytes") for p in self.parts]
        starts = np.cumsum([0] + [len(h) for h in has_bytes])
        flat = np.concatenate(has_bytes) if has_bytes else np.zeros(0, dtype=bool)
        frame["_has_bytes"] = flat[starts[frame[rows.PART_COLUMN].to_numpy()] + frame[rows.OFFSET_COLUMN].to_numpy()]
        frame = _filter(frame, self.classes, classes, cells, query)
        self._part = frame[rows.PART_COLUMN].to_numpy()
        self._offset = frame[rows.OFFSET_COLUMN].to_numpy()
        self._has_bytes = frame["_has_bytes"].to_numpy(dtype=bool)
        self.manifest: pd.DataFrame = frame.drop(columns=[rows.PART_COLUMN, rows.OFFSET_COLUMN, "_has_bytes"])
        # plain Python lists: an item's row dict is then a few list lookups, and its values
        # are ones any collate function accepts (str, int, float, bool)
        self._cols = {c: self.manifest[c].tolist() for c in ROW_COLUMNS if c in self.manifest}
        self._pid = None
        self._cache: OrderedDict = OrderedDict()

    # ---- per-process state ----------------------------------------------------------------
    def __getstate__(self):
        # sent to a spawned worker: no caches, no built objects (the folder drops its own);
        # each process makes its own
        state = dict(self.__dict__)
        state["_cache"] = OrderedDict()
        state["_pid"] = None
        return state

    def _local(self) -> None:
        if self._pid != os.getpid():
            self._cache = OrderedDict()
            self._pid = os.getpid()

    @property
    def built(self) -> Built:
        """The spec's Built, from the spec read when the dataset was opened; made on first use."""
        return self.folder.built

    # ---- the sequence protocol ------------------------------------------------------------
    def __len__(self) -> int:
        return len(self._part)

    def __iter__(self) -> Iterator[dict]:
        for i in range(len(self)):
            yield self[i]

    def _position(self, index) -> int:
        if isinstance(index, (bool, np.bool_)) or not isinstance(index, (int, np.integer)):
            raise TypeError(f"dataset indices are integers, not {type(index).__name__}")
        n = len(self)
        i = int(index)
        if i < -n or i >= n:
            raise DatasetIndexError(f"index {i} is out of range for {n} item(s) (valid: {-n}..{n - 1})",
                                    where=f"{self.root}:{self.split}")
        return i + n if i < 0 else i

    def row(self, index: int) -> dict:
        """The manifest row of item `index` as a dict of plain values."""
        i = self._position(index)
        return {c: col[i] for c, col in self._cols.items()}

    @one_opencv_thread_in_workers
    def __getitem__(self, index) -> dict:
        i = self._position(index)
        row = {c: col[i] for c, col in self._cols.items()}
        image, placed, lossless = self._image(i, row)
        if self.check_pixels:
            if not lossless:
                raise DatasetError("check_pixels needs losslessly stored images (PNG, or store none); these are "
                                   "lossy, so their pixels never match the checksum", where=f"{self.root}:{row['image_id']}")
            if pixel_sha256(image) != row["sha256"]:
                raise DatasetError("the image does not match its manifest checksum (sha256)",
                                   where=f"{self.root}:{row['image_id']}")
        mask_fn = (lambda: _target_mask(placed, self.hw)) if placed is not None else (lambda: self._mask(row))
        item = {"image": image, "target": _targets(self.names, row, self.param_names, mask_fn), "row": row}
        return bound(self, "Dataset.transform").apply(item)

    # ---- pixels ---------------------------------------------------------------------------
    def _image(self, i: int, row: dict):
        """(image, Placed of the target when re-rendered else None, whether stored losslessly)."""
        data = self._bytes(int(self._part[i]), int(self._offset[i])) if self._has_bytes[i] and not row["file"] else None
        got = images.load(self.folder, row, data=data)
        return got.image, got.placed, got.lossless

    def _bytes(self, part: int, offset: int) -> bytes:
        self._local()
        col = self._cache.get(part)
        if col is None:
            col = rows.read_column(self.folder, self.parts[part], "image_bytes")
            self._cache[part] = col
            while len(self._cache) > self.parquet_cache:
                self._cache.popitem(last=False)
        else:
            self._cache.move_to_end(part)
        return col[offset].as_py()

    def _mask(self, row: dict) -> np.ndarray:
        built = self.built
        sprite = built.source.sprite(int(row["class_index"]), int(row["instance"]))
        return _target_mask(footprint(sprite, render_params(row), self.hw, self.threshold), self.hw)

    def __repr__(self) -> str:
        return made_repr(self, {**self._made, **_settable(self)}, positional=("root", "split"))


def _many(value) -> bool:
    """Whether `value` is a collection of values (a list, range, array, index, dict keys ...),
    not one value (a string is one name)."""
    return isinstance(value, Iterable) and not isinstance(value, (str, bytes))


def _filter(df: pd.DataFrame, class_names, classes, cells, query) -> pd.DataFrame:
    keep = np.ones(len(df), dtype=bool)
    if classes is not None:
        if isinstance(classes, (str, int, np.integer)):
            classes = [classes]
        if not _many(classes):
            raise DatasetError(f"classes is a class name or index, or a list of them; got {classes!r}", where="classes")
        idx = []
        for c in classes:
            if isinstance(c, (int, np.integer)) and not isinstance(c, bool):
                if not 0 <= int(c) < len(class_names):
                    raise DatasetError(f"class index {c} is out of range (0..{len(class_names) - 1})", where="classes")
                idx.append(int(c))
            elif c in class_names:
                idx.append(class_names.index(c))
            else:
                close = difflib.get_close_matches(str(c), class_names, n=1)
                hint = f" (did you mean '{close[0]}'?)" if close else ""
                raise DatasetError(f"unknown class {c!r}{hint}; the dataset has {', '.join(class_names)}", where="classes")
        keep &= df["class_index"].isin(idx).to_numpy()
    if cells is not None:
        many = _many(cells)
        cells = list(cells) if many else [cells]
        if not all(isinstance(c, (int, np.integer)) and not isinstance(c, bool) for c in cells):
            raise DatasetError(f"cells is a cell number or a list of them (whole numbers); got {cells if many else cells[0]!r}",
                               where="cells")
        keep &= df["cell"].isin([int(c) for c in cells]).to_numpy()
    if query is not None:
        try:
            picked = df.query(query)
        except Exception as exc:  # noqa: BLE001 - pandas raises many kinds for a bad expression
            msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise DatasetError(f"the query cannot be evaluated on the manifest: {msg}", where=f"query {query!r}") from None
        keep &= df.index.isin(picked.index)
    return df[keep].reset_index(drop=True)


# ---- on-the-fly sampling --------------------------------------------------------------------


def _open_built(spec) -> Built:
    if isinstance(spec, Built):
        return spec
    p = Path(spec)
    if p.is_dir():
        return open_dataset(p).built
    return open_spec(p)


_SAMPLER_EXTRA = ("image_id", "split", "epoch", "item", "seed", "split_index", *BBOX_COLUMNS, "footprint_px",
                  "visible_fraction", "n_distractors", "width", "height")


class OnlineSampler:
    """Unlimited fresh images of one split: item `index` of epoch `epoch` draws its class,
    instance and transform from the split's region with the stream
    ``SeedSequence(seed, spawn_key=(ONLINE, split_index, epoch, index, PARAMS))`` and renders
    with the one for RENDER, so it is the same on any worker, in any order.

    Use it as an iterable (``iter()`` yields items ``start, start + 1, ...`` forever, or up to
    ``length``; inside torch DataLoader workers each takes its share in blocks of ``block``
    items — pass ``block=batch_size`` and worker batches equal the single-process ones), or,
    with ``length``, as a map-style dataset (``len``, ``[i]``) that DataLoader shuffles,
    batches and splits over workers itself. ``set_epoch(e)`` gives a new set of draws, in
    persistent DataLoader workers too (the epoch lives in shared memory; see augsplit.epoch).

    Items have the shape of ``Dataset`` items (``transform``, ``transform_kind`` and
    ``chw_float`` as there); ``row`` holds the drawn columns (manifest names)
    plus ``epoch``, ``item`` and ``image_id`` ``'<split>-e<epoch>-<index:07d>'``. With ``log`` (a ParamLog) every drawn item is recorded.
    ``spec`` is a spec file, a dataset folder or a Built; ``seed`` defaults to the spec's.
    """

    def __init__(self, spec, split: str, *, length: int | None = None, epoch: int = 0, seed: int | None = None,
                 target="class", chw_float: bool = False, log=None, block: int = 1, start: int = 0,
                 transform: Callable | None = None, transform_kind: str = "auto"):
        built = _open_built(spec)
        self._built = built
        self._split = built.plan.split(split)  # SpecError listing the splits when unknown
        self.split = split
        self.seed = built.plan.seed if seed is None else int(seed)
        if self.seed < 0:
            raise DatasetError(f"seed must be a non-negative integer, got {seed}", where="OnlineSampler")
        if length is not None and int(length) < 0:
            raise DatasetError(f"length must be >= 0, got {length}", where="OnlineSampler")
        if int(block) < 1 or int(start) < 0:
            raise DatasetError(f"block must be >= 1 and start >= 0, got block={block}, start={start}",
                               where="OnlineSampler")
        self.length = None if length is None else int(length)
        self._epoch = SharedEpoch(epoch, where="OnlineSampler.epoch")
        self.block = int(block)
        self.start = int(start)
        self.chw_float = bool(chw_float)
        self.transform = transform
        self.log = log
        self.param_names = param_names(built)
        self.hw = (built.plan.canvas.height, built.plan.canvas.width)
        self._k = built.plan.space.ndim + 3
        self.names = _check_target(target, tuple(self.draw(0)) + _SAMPLER_EXTRA, "target")
        self.target = target
        self.transform_kind = transform_kind
        bound(self, "OnlineSampler.transform")  # checked now; changed attributes are checked when next used
        self._made = {"spec": Shown(f"<spec {built.plan.hash}>") if isinstance(spec, Built) else spec, "split": split,
                      "length": length, "target": target, "chw_float": chw_float, "log": log, "block": block,
                      "start": start, "transform": transform, "transform_kind": transform_kind}  # for the repr

    @property
    def epoch(self) -> int:
        return self._epoch.value

    def set_epoch(self, epoch: int) -> None:
        """Make the following items those of `epoch`, in this process and in every DataLoader
        worker already started from it (persistent or not, fork or spawn): the epoch lives in
        shared memory. Call it before iterating the loader for that epoch."""
        self._epoch.set(epoch, where="OnlineSampler.set_epoch")

    def __len__(self) -> int:
        if self.length is None:
            raise TypeError("an unlimited OnlineSampler has no length; pass length=N to use it map-style")
        return self.length

    def __getitem__(self, index) -> dict:
        if self.length is None:
            raise TypeError("an unlimited OnlineSampler is iterated, not indexed; pass length=N to index it")
        if isinstance(index, (bool, np.bool_)) or not isinstance(index, (int, np.integer)):
            raise TypeError(f"sampler indices are integers, not {type(index).__name__}")
        i, n = int(index), self.length
        if i < -n or i >= n:
            raise DatasetIndexError(f"index {i} is out of range for {n} item(s) per epoch (valid: {-n}..{n - 1})",
                                    where=f"OnlineSampler:{self.split}")
        return self.item(i + n if i < 0 else i)

    def __iter__(self) -> Iterator[dict]:
        wid, nw = 0, 1
        torch = __import__("sys").modules.get("torch")
        if torch is not None:
            info = torch.utils.data.get_worker_info()
            if info is not None:
                wid, nw = int(info.id), int(info.num_workers)
        b = self.block
        k = self.start + wid * b  # this worker's blocks: wid, wid + nw, wid + 2 nw, ...
        while True:
            for index in range(k, k + b):
                if self.length is not None and index >= self.start + self.length:
                    return
                yield self.item(index)
            k += nw * b

    def draw(self, index: int, epoch: int | None = None) -> dict:
        """The drawn columns of item `index` (class, instance, every axis, cx_px, cy_px, cell)."""
        epoch = self.epoch if epoch is None else int(epoch)
        u = online_rng(self.seed, self._split.index, epoch, index, PARAMS).random((1, self._k))
        cols = draw_online(self._built.plan, self._split, u, indices=[index])
        return {k: (v[0].item() if isinstance(v[0], np.generic) else v[0]) for k, v in cols.items()}

    @one_opencv_thread_in_workers
    def item(self, index: int, epoch: int | None = None) -> dict:
        """Item `index` of `epoch` (default: the current epoch)."""
        epoch = self.epoch if epoch is None else int(epoch)
        index = int(index)
        row = self.draw(index, epoch)
        built = self._built
        rng = LazyStream(functools.partial(online_rng, self.seed, self._split.index, epoch, index, RENDER))
        scene = make_scene(built.plan, built.source, built.background, self._split, row, rng=rng)
        t = scene.target
        row.update(image_id=f"{self.split}-e{epoch}-{index:07d}", split=self.split, epoch=epoch, item=index,
                   seed=self.seed, split_index=self._split.index,
                   bbox_x0=t.bbox[0], bbox_y0=t.bbox[1], bbox_x1=t.bbox[2], bbox_y1=t.bbox[3],
                   footprint_px=t.footprint_px, visible_fraction=t.visible_fraction,
                   n_distractors=len(scene.distractors), width=self.hw[1], height=self.hw[0])
        if self.log is not None:
            self.log.record(built.plan, self.split, row, epoch=epoch, item=index, source="OnlineSampler")
        item = {"image": scene.image,
                "target": _targets(self.names, row, self.param_names, lambda: _target_mask(t, self.hw)),
                "row": row}
        return bound(self, "OnlineSampler.transform").apply(item)

    def torch_iterable(self):
        """This sampler as a torch IterableDataset (imports torch), for DataLoader's iterable
        mode; plain iteration and map-style use need no torch at all."""
        return _torch_iterable_class()(self)

    def __repr__(self) -> str:
        # the epoch and seed in force (set_epoch changes the one; a seed equal to the spec's is its default)
        return made_repr(self, {**self._made, **_settable(self), "epoch": self.epoch,
                                "seed": None if self.seed == self._built.plan.seed else self.seed},
                         positional=("spec", "split"))


@functools.lru_cache(maxsize=None)
def _torch_iterable_class():
    import torch.utils.data as tud

    class TorchOnlineIterable(tud.IterableDataset):
        """An OnlineSampler seen by torch as an IterableDataset (workers shard it themselves)."""

        def __init__(self, sampler: OnlineSampler):
            self.sampler = sampler

        def __iter__(self):
            return iter(self.sampler)

        def __repr__(self) -> str:
            return made_repr(self, {"sampler": self.sampler}, positional=("sampler",))

    TorchOnlineIterable.__module__ = __name__
    TorchOnlineIterable.__qualname__ = "TorchOnlineIterable"
    return TorchOnlineIterable


def __getattr__(name: str):
    # made on first use, so importing this module never imports torch; pickle finds it here
    if name == "TorchOnlineIterable":
        return _torch_iterable_class()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
