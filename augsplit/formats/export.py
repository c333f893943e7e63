"""augsplit's datasets out: `export(dataset, out, to)` writes a finished dataset as COCO JSON,
YOLO (detection or segmentation), tar shards of (image, JSON) pairs, or a Hugging Face
`datasets` layout. The writers live in `exporters`; this module owns what they share: the
rows in spec order, each row's encoded image (stored bytes as they are, or re-rendered and
PNG-encoded) and its objects with their footprints, and the output folder's guard.

The output folder is new, empty, or an earlier export of ours: `augsplit-export.json` is
written first (marking an export in progress: the files of its format's layout are ours) and
last (listing every file the export wrote), so a rerun, also after an interrupted run,
replaces or removes only our files and refuses a folder holding anything else. Nothing
outside the output folder is written.
"""

from __future__ import annotations

import json
import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..dataset.layout import final_name
from ..errors import AugsplitError, DatasetError
from ..io import check_folder_target, ensure_folder, write_text_atomic

MARKER = "augsplit-export.json"
FORMATS = ("coco", "yolo", "yolo-seg", "tar", "hf")
DEFAULT_PER_SHARD = 1000  # images per tar shard or HF Parquet file


@dataclass(frozen=True)
class Obj:
    """One object of an image: the target (k = -1) or a distractor (k >= 0)."""

    k: int
    class_index: int
    class_name: str
    bbox: tuple[int, int, int, int]  # x0, y0, x1, y1 (exclusive), as the manifest states it
    area: int  # footprint pixels on the canvas
    mask: np.ndarray | None  # bool (H, W) footprint on the canvas, when the writer needs masks


@dataclass(frozen=True)
class Item:
    """One image to export: its manifest row, encoded bytes, file suffix and objects."""

    row: dict
    data: bytes
    suffix: str
    objects: tuple[Obj, ...]


def suffix_of(data: bytes) -> str:
    """The file suffix of encoded image bytes, from their signature (PNG spec 5.2; JPEG SOI
    marker FF D8 FF; WebP's RIFF....WEBP header, from memory)."""
    if data[:8] == b"\x89PNG\r\n\x1a\n":
        return ".png"
    if data[:3] == b"\xff\xd8\xff":
        return ".jpg"
    if data[:4] == b"RIFF" and data[8:12] == b"WEBP":
        return ".webp"
    raise DatasetError("a stored image is neither PNG, JPEG nor WebP", where="image_bytes")


def canvas_mask(placed, hw: tuple[int, int]) -> np.ndarray:
    """A renderer Placed (bbox + cropped mask) as a bool mask of the whole canvas."""
    out = np.zeros(hw, dtype=bool)
    x0, y0, x1, y1 = placed.bbox
    if placed.footprint_px:
        out[y0:y1, x0:x1] = placed.mask
    return out


class Rows:
    """The rows of a finished dataset with what every writer needs (see the module docstring)."""

    def __init__(self, folder, masks: bool):
        self.folder = folder
        self.masks = masks
        self.hw = folder.hw
        self.classes = self._classes()

    def _classes(self) -> tuple[str, ...]:
        """The spec's classes in the object source's order. Without masks to re-render, a dataset
        whose objects cannot be built (a moved sprite folder) names them from its manifest."""
        try:
            return tuple(self.folder.built.source.classes)
        except AugsplitError:
            if self.masks:
                raise
        from ..dataset import read_rows

        pairs = read_rows(self.folder, columns=["class_index", "class_name"]).drop_duplicates()
        names = dict(zip(pairs["class_index"].astype(int), pairs["class_name"].astype(str)))
        return tuple(names.get(i, f"class_{i}") for i in range(max(names, default=-1) + 1))

    def count(self) -> int:
        return sum(p.rows for p in self.folder.parts_of())

    def splits(self):
        """(split, iterator of Items) in spec order, rows in image order."""
        for split in self.folder.splits:
            yield split, self._items(split)

    def _distractors(self, split: str) -> dict[str, list[dict]]:
        from ..dataset import read_rows

        d = read_rows(self.folder, "distractors", splits=[split])
        out: dict[str, list[dict]] = {}
        for r in d.to_dict("records"):
            out.setdefault(r["image_id"], []).append(r)
        return out

    def _items(self, split: str):
        from ..dataset import iter_batches

        extra = self._distractors(split)
        for batch in iter_batches(self.folder, splits=[split], batch_rows=256):
            for row in batch.to_dict("records"):
                data = self._encoded(row)
                objs = [self._object(-1, row)] + [self._object(int(r["k"]), r) for r in extra.get(row["image_id"], [])]
                row.pop("image_bytes", None)
                yield Item(row, data, suffix_of(data), tuple(o for o in objs if o.area > 0))

    def _encoded(self, row: dict) -> bytes:
        from ..dataset.images import check_identity, checked_bytes, decode, encode, rerender, row_where

        check_identity(row)  # an export names each image by its row's id
        # a stored image is copied only as it was written: its recorded checksum, or (a folder
        # from before checksums of the bytes were recorded) an image that decodes to the canvas
        data = checked_bytes(self.folder, row)
        if data is None:  # --store none: the row re-made, losslessly encoded as the layout says
            deflate, level = self.folder.png_setting
            return encode(rerender(self.folder, row).image, "png", 0, level, deflate)
        recorded = row.get("file_sha256")
        if not (isinstance(recorded, str) and recorded):
            decode(data, self.folder.channels, row_where(row), self.folder.hw)
        return data

    def _object(self, k: int, r: dict) -> Obj:
        mask = None
        if self.masks and int(r["footprint_px"]) > 0:
            from ..render import footprint
            from ..scene import render_params

            built = self.folder.built
            sprite = built.source.sprite(int(r["class_index"]), int(r["instance"]))
            mask = canvas_mask(footprint(sprite, render_params(r), self.hw, built.plan.render.alpha_threshold), self.hw)
        box = tuple(int(r[c]) for c in ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"))
        return Obj(k, int(r["class_index"]), str(r["class_name"]), box, int(r["footprint_px"]), mask)


# ---- the output folder ----------------------------------------------------------------------


def layout_re(to: str, splits) -> re.Pattern:
    """The relative paths an export of format `to` writes for these splits (see `exporters`)."""
    s = "(?:" + "|".join(re.escape(x) for x in splits) + ")" if splits else "(?!)"
    img = rf"{s}-\d{{7,}}\.(?:png|jpg|webp)"
    paths = {"coco": [rf"{s}\.json", rf"{s}/{img}"],
             "yolo": [r"data\.yaml", rf"images/{s}/{img}", rf"labels/{s}/{s}-\d{{7,}}\.txt"],
             "tar": [rf"{s}-\d{{6,}}\.tar"],
             "hf": [r"README\.md", rf"data/{s}-\d{{5,}}-of-\d{{5,}}\.parquet"]}
    paths["yolo-seg"] = paths["yolo"]
    return re.compile("|".join(paths[to]))


def _marker(out: Path) -> dict | None:
    marker = out / MARKER
    if not marker.is_file() or marker.is_symlink():
        return None
    try:
        doc = json.loads(marker.read_text(encoding="utf-8"))
        doc["files"] = [str(f) for f in doc["files"]]
        return doc
    except (OSError, ValueError, KeyError, TypeError):
        raise DatasetError("unreadable list of the files an earlier export wrote", where=str(marker)) from None


def _ours(out: Path, doc: dict | None) -> set[str]:
    """The files an earlier export made in `out`: those its marker lists and, when it was
    interrupted (`complete` false), every file of its format's layout and every temporary."""
    if doc is None:
        return set()
    files = {f for f in doc["files"] if (out / f).is_file()}
    if doc.get("complete") is False and doc.get("format") in FORMATS:
        pattern = layout_re(doc["format"], [str(s) for s in doc.get("splits") or []])
        for p in out.rglob("*"):
            rel = p.relative_to(out).as_posix()
            final = (p.parent / final_name(p.name)).relative_to(out).as_posix()  # a file, or its temporary
            if p.is_file() and not p.is_symlink() and pattern.fullmatch(final):
                files.add(rel)
    return files


def prepare(out: str | Path, dataset: str | Path) -> tuple[Path, set[str]]:
    """Check `out` may take an export (see the module docstring); return it and the files an
    earlier export made there. Creates `out` (its parent must exist)."""
    out = check_folder_target(out)
    src = os.path.realpath(dataset)
    if Path(os.path.realpath(out)).is_relative_to(src):
        raise DatasetError("lies inside the dataset folder; give an export folder outside it", where=str(out))
    ours: set[str] = set()
    if out.is_dir():
        doc = _marker(out)
        ours = _ours(out, doc)
        strangers = []
        for dirpath, dirnames, filenames in os.walk(out):
            for name in dirnames + filenames:
                p = Path(dirpath) / name
                rel = p.relative_to(out).as_posix()
                if p.is_symlink() or not (p.is_dir() or p.is_file()) or (p.is_file() and rel != MARKER and rel not in ours):
                    strangers.append(rel)
            if len(strangers) > 3:
                break
        if strangers:
            what = "holds files no augsplit export wrote" if doc is None else "holds files the earlier export did not write"
            raise DatasetError(f"{what} (e.g. {', '.join(sorted(strangers)[:3])}); give a new or empty --out", where=str(out))
    return ensure_folder(out), ours


def start(out: Path, ours: set[str], meta: dict) -> None:
    """Mark the folder as an export in progress before writing anything into it, so an
    interrupted run's files are known as ours (see `_ours`)."""
    write_text_atomic(out / MARKER, json.dumps({**meta, "complete": False, "files": sorted(ours)}, indent=1))


def finish(out: Path, ours: set[str], written: list[str], meta: dict) -> None:
    """Remove what an earlier export made and this one did not; write the marker last."""
    keep = set(written)
    for rel in sorted(ours - keep):
        p = out / rel
        if p.is_file() and not p.is_symlink():
            p.unlink()
    for rel in sorted({str(Path(r).parent) for r in ours - keep}, key=len, reverse=True):
        d = out / rel
        if rel != "." and d.is_dir() and not d.is_symlink() and not any(d.iterdir()):
            d.rmdir()
    write_text_atomic(out / MARKER, json.dumps({**meta, "complete": True, "files": sorted(keep)}, indent=1))


def export(dataset: str | Path, out: str | Path, to: str, *, per_shard: int = DEFAULT_PER_SHARD,
           progress: bool = False) -> dict:
    """Export a finished dataset folder to `to` (one of FORMATS) in the folder `out`.
    Returns a summary: images and objects per split, files written."""
    from ..dataset import open_dataset
    from ..progress import bar
    from .exporters import WRITERS

    if to not in FORMATS:
        raise DatasetError(f"unknown export format {to!r}; choose one of {', '.join(FORMATS)}", where="--to")
    if int(per_shard) < 1:
        raise DatasetError(f"images per shard must be at least 1, got {per_shard}", where="--per-shard")
    folder = open_dataset(dataset)
    rows = Rows(folder, masks=to in ("coco", "yolo-seg"))
    WRITERS[to].check(rows)  # all refusals before the output folder is made
    out, ours = prepare(out, dataset)
    writer = WRITERS[to](out, rows, int(per_shard))
    meta = {"format": to, "dataset": str(Path(dataset).resolve()), "spec_hash": folder.spec_hash,
            "splits": list(folder.splits)}
    start(out, ours, meta)
    counts: dict[str, dict] = {}
    with bar(total=rows.count(), unit="img", desc=f"export {to}", disable=not progress) as pbar:
        for split, items in rows.splits():
            n_img = n_obj = 0
            for item in writer.split(split, items):
                n_img += 1
                n_obj += len(item.objects)
                pbar.update(1)
            counts[split] = {"images": n_img, "objects": n_obj}
    written = writer.finish(counts)
    finish(out, ours, written, {**meta, "images": counts})
    return {"format": to, "out": str(out), "splits": counts, "files": len(written) + 1}
