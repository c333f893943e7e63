"""THE manifest schema: column names, types, units, and the metadata every part file carries.

A dataset's image table (one row per image) and distractor table (one row per extra object)
are hive-partitioned by split (the folders: augsplit.dataset.layout; reading them:
augsplit.dataset.rows). Every file carries the canonical spec, its hash and package versions
in its Parquet key-value metadata, so any tool (pandas, pyarrow.dataset, duckdb) reads the
dataset without augsplit.
"""

from __future__ import annotations

import functools
import hashlib
import json
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from .columnar import to_arrow
from .space.axes import AXIS_COLUMNS as AXIS_COLUMN_NAMES, BUILTIN


@dataclass(frozen=True)
class Column:
    name: str
    type: pa.DataType
    unit: str
    doc: str


def _c(name, type_, unit, doc):
    return Column(name, type_, unit, doc)


# Axis values as sampled, in the spec's own unit for that axis (see the spec's `axes:`).
# Axes a spec does not vary hold their fixed default (scale 1, angle 0, hue 0, ...).
# Names, types, units and meanings come from the axis catalogue (augsplit.space.axes).
AXIS_COLUMNS = AXIS_COLUMN_NAMES
AXIS_FIELDS: tuple[Column, ...] = tuple(
    _c(k.column, getattr(pa, k.dtype)(), "spec" if len(k.units) > 1 else k.units[0],
       k.doc + (", spec unit" if len(k.units) > 1 else ""))
    for k in BUILTIN.values() if k.column)

IMAGE_COLUMNS: tuple[Column, ...] = (
    _c("image_id", pa.string(), "", "unique id '<split>-<index:07d>'; predictions join on it"),
    _c("split", pa.string(), "", "split name: the partition folder split=<name>, not stored inside the files"),
    _c("split_index", pa.int32(), "", "position of the split in the spec (part of the seed key)"),
    _c("index", pa.int64(), "", "image number within the split (part of the seed key)"),
    _c("seed", pa.int64(), "", "the spec seed; the image's stream is SeedSequence(seed, spawn_key=(split_index, index, purpose))"),
    _c("class_name", pa.string(), "", "object class"),
    _c("class_index", pa.int32(), "", "class number in the object source's order"),
    _c("instance", pa.int32(), "", "object instance within the class"),
    _c("instance_seen", pa.bool_(), "", "whether the instance is one of the class's seen instances"),
    _c("cell", pa.int32(), "", "which disjoint box (region cell) of the split's region the parameters came from"),
    *AXIS_FIELDS,
    _c("cx_px", pa.float64(), "px", "object centre as rendered, column coordinate (pixel centres at .5)"),
    _c("cy_px", pa.float64(), "px", "object centre as rendered, row coordinate"),
    _c("x_deg", pa.float64(), "deg", "horizontal visual angle of the centre from the canvas centre (NaN without viewing)"),
    _c("y_deg", pa.float64(), "deg", "vertical visual angle of the centre from the canvas centre, down positive"),
    _c("eccentricity_deg", pa.float64(), "deg", "visual angle of the centre from the canvas centre"),
    _c("size_px", pa.float64(), "px", "object extent as rendered: scale x native diameter about the anchor"),
    _c("size_deg", pa.float64(), "deg", "size_px as a visual angle, exact 2*atan(s/2d)"),
    _c("bbox_x0", pa.int32(), "px", "bounding box of the visible footprint, first column"),
    _c("bbox_y0", pa.int32(), "px", "first row"),
    _c("bbox_x1", pa.int32(), "px", "one past the last column"),
    _c("bbox_y1", pa.int32(), "px", "one past the last row"),
    _c("footprint_px", pa.int32(), "px", "pixels of the object on the canvas (alpha above threshold)"),
    _c("visible_fraction", pa.float32(), "", "footprint on the canvas / footprint were the canvas unbounded"),
    _c("n_distractors", pa.int16(), "", "extra objects in the scene (rows in the distractors table)"),
    _c("width", pa.int32(), "px", "canvas width"),
    _c("height", pa.int32(), "px", "canvas height"),
    _c("file", pa.string(), "", "image path relative to the dataset folder ('' when not stored as a file)"),
    _c("image_bytes", pa.binary(), "", "encoded image when stored in Parquet (null otherwise)"),
    _c("sha256", pa.string(), "", "SHA-256 of the raw pixel array (H x W x C uint8, C-order)"),
    _c("file_sha256", pa.string(), "", "SHA-256 of the stored image's encoded bytes as written (file, "
       "image_bytes or tar member), so lossy formats are checked too; null with --store none"),
    _c("tar_file", pa.string(), "", "with --store tar: the shard's tar relative to the dataset folder "
       "(members <image_id>.<ext> and <image_id>.json); '' otherwise"),
    _c("tar_offset", pa.int64(), "B", "with --store tar: byte offset of the image member's 512-byte ustar "
       "header in tar_file; null otherwise"),
)

# Columns added after datasets were first written: a part made before them lacks them, and
# readers see nulls there (verify counts what it therefore could not check).
ADDED_COLUMNS = ("file_sha256", "tar_file", "tar_offset")

DISTRACTOR_COLUMNS: tuple[Column, ...] = (
    _c("image_id", pa.string(), "", "the scene's image id"),
    _c("split", pa.string(), "", "split name (partition folder)"),
    _c("k", pa.int16(), "", "distractor number within the scene"),
    _c("class_name", pa.string(), "", "object class"),
    _c("class_index", pa.int32(), "", "class number"),
    _c("instance", pa.int32(), "", "instance within the class"),
    _c("cx_px", pa.float64(), "px", "centre column"),
    _c("cy_px", pa.float64(), "px", "centre row"),
    *(f for f in AXIS_FIELDS if BUILTIN[f.name].render_param),  # what the renderer took, by name
    _c("bbox_x0", pa.int32(), "px", "visible bounding box"),
    _c("bbox_y0", pa.int32(), "px", ""),
    _c("bbox_x1", pa.int32(), "px", ""),
    _c("bbox_y1", pa.int32(), "px", ""),
    _c("footprint_px", pa.int32(), "px", "pixels on the canvas"),
    _c("visible_fraction", pa.float32(), "", "visible share"),
)

PARTITION = "split"  # the partition key lives in folder names, so it is not a file column
IMAGE_SCHEMA = pa.schema([pa.field(c.name, c.type) for c in IMAGE_COLUMNS if c.name != PARTITION])
DISTRACTOR_SCHEMA = pa.schema([pa.field(c.name, c.type) for c in DISTRACTOR_COLUMNS if c.name != PARTITION])
UNITS = {c.name: c.unit for c in IMAGE_COLUMNS}

# keys of every part file's Parquet key-value metadata (where files live: augsplit.dataset.layout)
META_SPEC, META_HASH, META_VERSIONS = b"augsplit.spec", b"augsplit.spec_hash", b"augsplit.versions"


def versions() -> dict:
    """The versions of the libraries that decide a dataset's bytes (and Python's)."""
    return dict(_versions())


@functools.lru_cache(maxsize=1)
def _versions() -> dict:  # once per process: reading a package's metadata takes 2.6 ms
    import sys
    import zlib
    from importlib.metadata import version

    import cv2
    import numpy

    from . import __version__

    # scipy's FFT makes the pink-noise pixels; its version is read from its metadata, as
    # importing it costs every generation run 0.2 s. isal and zlib deflate the PNG files.
    return {"augsplit": __version__, "numpy": numpy.__version__, "opencv": cv2.__version__,
            "pyarrow": pa.__version__, "scipy": version("scipy"), "isal": version("isal"),
            "zlib": zlib.ZLIB_RUNTIME_VERSION, "python": sys.version.split()[0]}


def file_metadata(canonical_spec: str, spec_hash: str) -> dict[bytes, bytes]:
    return {META_SPEC: canonical_spec.encode(), META_HASH: spec_hash.encode(),
            META_VERSIONS: json.dumps(versions(), sort_keys=True).encode()}


def to_table(columns: dict, schema: pa.Schema, metadata: dict[bytes, bytes]) -> pa.Table:
    """Columns (name -> array/list) conformed to the schema; absent columns become nulls.
    NaN and None become nulls too (pandas is not imported: see augsplit.columnar)."""
    n = len(next(iter(columns.values()))) if columns else 0
    arrays = []
    for f in schema:
        if f.name in columns:
            arrays.append(to_arrow(columns[f.name], f.type))
        else:
            arrays.append(pa.nulls(n, type=f.type))
    return pa.Table.from_arrays(arrays, schema=schema.with_metadata(metadata))


def pixel_sha256(image: np.ndarray) -> str:
    """The `sha256` column: SHA-256 hex of the raw pixel array (H x W x C uint8, C order),
    hashed in place (no copy of a contiguous image)."""
    pixels = np.ascontiguousarray(image)
    return hashlib.sha256(memoryview(pixels).cast("B") if pixels.size else b"").hexdigest()
