"""The export writers, one per format (see `export` for what they share). Each takes the items
of one split after another and returns the relative paths of every file it wrote.

    coco      <split>.json (images, annotations: bbox [x, y, w, h] and the footprint as
              compressed RLE; categories = the spec's classes, ids from 1) + <split>/<image>
    yolo      images/<split>/<image>, labels/<split>/<image>.txt (`class cx cy w h`, fractions
              of the image), data.yaml (split folders and class names)
    yolo-seg  the same with `class x1 y1 x2 y2 ...`: the outer contour of the footprint
    tar       <split>-NNNNNN.tar: per image `<id>.<ext>` and `<id>.json` (its manifest row),
              a fixed number of images per shard, headers fixed (mtime 0, uid/gid 0, mode 0644)
    hf        data/<split>-NNNNN-of-NNNNN.parquet (the manifest columns, `split`, and `image`)
              + README.md whose YAML header maps every split to its files
"""

from __future__ import annotations

import json
import re
import tarfile
from io import BytesIO

import cv2
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .. import manifest as mf
from ..errors import DatasetError
from ..io import ensure_folder, output_path, plain, write_files_atomic, write_text_atomic
from . import rle

BATCH_FILES = 256  # image files made durable together (one sync per batch)


class Writer:
    """What every writer shares: the output folder, folders made inside it, batched files."""

    def __init__(self, out, rows, per_shard: int):
        self.out, self.rows, self.per_shard = out, rows, per_shard
        self.written: list[str] = []
        self._pending: list[tuple[str, bytes]] = []

    @classmethod
    def check(cls, rows) -> None:
        """Refuse, before anything is written, what this format cannot hold."""

    def folder(self, rel: str) -> None:
        d = self.out
        for part in rel.split("/"):
            d = ensure_folder(d / part)  # a real folder at every level, never through a link

    def file(self, rel: str, data: bytes) -> None:
        self._pending.append((rel, data))
        if len(self._pending) >= BATCH_FILES:
            self.flush()

    def flush(self) -> None:
        if self._pending:
            write_files_atomic([(self.out / rel, data) for rel, data in self._pending])
            self.written += [rel for rel, _ in self._pending]
            self._pending = []

    def text(self, rel: str, text: str) -> None:
        write_text_atomic(self.out / rel, text)
        self.written.append(rel)

    def split(self, name: str, items):
        raise NotImplementedError

    def finish(self, counts: dict) -> list[str]:
        self.flush()
        return self.written


# ---- COCO ---------------------------------------------------------------------------------


class Coco(Writer):
    def __init__(self, *args):
        super().__init__(*args)
        self.next_image = self.next_ann = 1
        self.categories = [{"id": i + 1, "name": c, "supercategory": "object"} for i, c in enumerate(self.rows.classes)]

    def split(self, name, items):
        images, anns = [], []
        self.folder(name)
        h, w = self.rows.hw
        for item in items:
            rel = f"{name}/{item.row['image_id']}{item.suffix}"
            self.file(rel, item.data)
            iid = self.next_image
            self.next_image += 1
            images.append({"id": iid, "file_name": rel, "width": w, "height": h, "augsplit_image_id": item.row["image_id"]})
            for o in item.objects:
                x0, y0, x1, y1 = o.bbox
                anns.append({"id": self.next_ann, "image_id": iid, "category_id": o.class_index + 1,
                             "bbox": [x0, y0, x1 - x0, y1 - y0], "area": o.area, "segmentation": rle.encode(o.mask),
                             "iscrowd": 0, "augsplit_object": o.k})
                self.next_ann += 1
            yield item
        self.flush()
        doc = {"info": {"description": f"augsplit export, split {name}"}, "images": images, "annotations": anns,
               "categories": self.categories}
        self.text(f"{name}.json", json.dumps(doc))


# ---- YOLO ---------------------------------------------------------------------------------


def polygon(mask: np.ndarray) -> np.ndarray:
    """The outer contour of the mask's largest component as (n, 2) pixel (col, row) points
    (cv2.findContours, external contours, collinear points dropped); a footprint too small for
    a polygon of three points gets the corners of its pixels' box."""
    contours, _ = cv2.findContours(mask.astype(np.uint8), cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)
    best = max(contours, key=cv2.contourArea).reshape(-1, 2) if contours else np.zeros((0, 2), int)
    if len(best) >= 3:
        return best
    rows, cols = np.nonzero(mask)
    x0, x1, y0, y1 = cols.min(), cols.max(), rows.min(), rows.max()
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])


class Yolo(Writer):
    seg = False

    def split(self, name, items):
        self.folder(f"images/{name}")
        self.folder(f"labels/{name}")
        h, w = self.rows.hw
        for item in items:
            iid = item.row["image_id"]
            self.file(f"images/{name}/{iid}{item.suffix}", item.data)
            self.file(f"labels/{name}/{iid}.txt", "".join(self._line(o, w, h) for o in item.objects).encode())
            yield item

    def _line(self, o, w: int, h: int) -> str:
        if self.seg:  # normalised polygon vertices, as pixel index / size (common practice, no source)
            pts = polygon(o.mask) / np.array([w, h], dtype=float)
            return f"{o.class_index} " + " ".join(f"{v:.6f}" for v in pts.reshape(-1)) + "\n"
        x0, y0, x1, y1 = o.bbox
        return f"{o.class_index} {(x0 + x1) / 2 / w:.6f} {(y0 + y1) / 2 / h:.6f} {(x1 - x0) / w:.6f} {(y1 - y0) / h:.6f}\n"

    def finish(self, counts):
        # no `path:` key, so the folders resolve beside data.yaml wherever the export is moved
        # keys as JSON strings (valid YAML): a split named on, yes or no is not read as a boolean
        lines = [f"{json.dumps(s)}: images/{s}" for s in counts]
        lines.append("nc: %d" % len(self.rows.classes))
        lines.append("names:")
        lines += [f"  {i}: {json.dumps(c)}" for i, c in enumerate(self.rows.classes)]
        self.text("data.yaml", "\n".join(lines) + "\n")
        return super().finish(counts)


class YoloSeg(Yolo):
    seg = True


# ---- tar shards ---------------------------------------------------------------------------


def member(name: str, size: int) -> tarfile.TarInfo:
    """A tar header that depends on the name and size only."""
    info = tarfile.TarInfo(name)
    info.size, info.mtime, info.mode = size, 0, 0o644
    info.uid = info.gid = 0
    info.uname = info.gname = ""
    return info


def row_json(row: dict) -> bytes:
    return json.dumps(plain(row), separators=(",", ":")).encode()


class Tar(Writer):
    def split(self, name, items):
        shard, tar, ctx, n = 0, None, None, 0
        try:
            for item in items:
                if tar is None:
                    rel = f"{name}-{shard:06d}.tar"
                    ctx = output_path(self.out / rel)
                    tmp = ctx.__enter__()
                    tar = tarfile.open(tmp, "x", format=tarfile.GNU_FORMAT)
                iid = item.row["image_id"]
                meta = row_json(item.row)
                tar.addfile(member(f"{iid}{item.suffix}", len(item.data)), BytesIO(item.data))
                tar.addfile(member(f"{iid}.json", len(meta)), BytesIO(meta))
                n += 1
                yield item
                if n == self.per_shard:
                    tar.close()
                    tar = None
                    ctx.__exit__(None, None, None)
                    ctx = None
                    self.written.append(rel)
                    shard, n = shard + 1, 0
            if tar is not None:
                tar.close()
                tar = None
                ctx.__exit__(None, None, None)
                ctx = None
                self.written.append(rel)
        except BaseException as exc:
            if tar is not None:
                tar.close()
            if ctx is not None:
                ctx.__exit__(type(exc), exc, exc.__traceback__)  # the temporary goes
            raise


# ---- Hugging Face -------------------------------------------------------------------------

HF_SPLIT = re.compile(r"\w+(\.\w+)*")  # the split names `datasets` accepts (from memory of its check)
_VALUE = {pa.string(): "string", pa.int8(): "int8", pa.int16(): "int16", pa.int32(): "int32", pa.int64(): "int64",
          pa.float32(): "float32", pa.float64(): "float64", pa.bool_(): "bool"}
IMAGE = "image"


def hf_schema() -> pa.Schema:
    """The manifest columns (no image_bytes), `split`, and `image` as {bytes, path}, with the
    features `datasets` reads from a Parquet file's `huggingface` metadata (Value / Image)."""
    fields = [f for f in mf.IMAGE_SCHEMA if f.name != "image_bytes"]
    fields.insert(1, pa.field(mf.PARTITION, pa.string()))
    fields.append(pa.field(IMAGE, pa.struct([("bytes", pa.binary()), ("path", pa.string())])))
    features = {f.name: {"dtype": _VALUE[f.type], "_type": "Value"} for f in fields if f.name != IMAGE}
    features[IMAGE] = {"_type": "Image"}
    meta = {b"huggingface": json.dumps({"info": {"features": features}}).encode()}
    return pa.schema(fields, metadata=meta)


class HuggingFace(Writer):
    def __init__(self, *args):
        super().__init__(*args)
        self.schema = hf_schema()

    @classmethod
    def check(cls, rows):
        for s in rows.folder.splits:
            if not HF_SPLIT.fullmatch(s):
                raise DatasetError(f"split name {s!r} is not one Hugging Face datasets accepts (letters, digits, "
                                   "'_', dots between them); export another format", where="splits")

    def split(self, name, items):
        total = sum(p.rows for p in self.rows.folder.parts_of(splits=[name]))
        n_files = max(1, -(-total // self.per_shard))
        self.folder("data")
        chunk, k = [], 0
        for item in items:
            chunk.append(item)
            yield item
            if len(chunk) == self.per_shard:
                self._write(name, k, n_files, chunk)
                chunk, k = [], k + 1
        if chunk or k == 0:
            self._write(name, k, n_files, chunk)

    def _write(self, name, k, n_files, chunk) -> None:
        cols = {f.name: [it.row.get(f.name) for it in chunk] for f in self.schema if f.name not in (IMAGE, mf.PARTITION)}
        cols[mf.PARTITION] = [name] * len(chunk)
        cols[IMAGE] = [{"bytes": it.data, "path": f"{it.row['image_id']}{it.suffix}"} for it in chunk]
        table = pa.table({f.name: pa.array(cols[f.name], type=f.type, from_pandas=True) for f in self.schema},
                         schema=self.schema)
        rel = f"data/{name}-{k:05d}-of-{n_files:05d}.parquet"
        with output_path(self.out / rel) as tmp:
            pq.write_table(table, tmp)
        self.written.append(rel)

    def finish(self, counts):
        head = ["---", "configs:", "- config_name: default", "  data_files:"]
        for s in counts:
            head += [f"  - split: {s}", f"    path: data/{s}-*"]
        head.append("---")
        spec_hash = self.rows.folder.spec_hash
        body = ["", "# augsplit dataset", "",
                f"Exported from an augsplit dataset (spec {spec_hash}). One row per image; the split is both the "
                "file name and the `split` column. Load it with `datasets.load_dataset(\"parquet\", "
                "data_files=...)` or `datasets.load_dataset(FOLDER)`.", "",
                "| split | images |", "|---|---|"] + [f"| {s} | {c['images']} |" for s, c in counts.items()]
        body += ["", "| column | unit | meaning |", "|---|---|---|"]
        body += [f"| {c.name} | {c.unit} | {c.doc} |" for c in mf.IMAGE_COLUMNS if c.name != "image_bytes"]
        body.append(f"| {IMAGE} |  | the encoded image (PNG as generated, or re-made from the row) |")
        self.text("README.md", "\n".join(head + body) + "\n")
        return super().finish(counts)


WRITERS = {"coco": Coco, "yolo": Yolo, "yolo-seg": YoloSeg, "tar": Tar, "hf": HuggingFace}
