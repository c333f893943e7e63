"""Opening a dataset folder: `open_dataset(path)` -> DatasetFolder, checked once.

One policy for every command and loader: a folder without dataset.json (an unfinished run) is
refused naming `--resume`, and a mixed folder (parts of another spec, parts no shard of this
dataset makes, splits the spec does not have, parts that do not match the declared schema) is
refused naming the part; `allow_incomplete=True` admits an unfinished folder, never a mixed one.
The spec's objects are built only when something needs them (a moved dataset whose sprite
folder is gone still opens and serves its stored images).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from .. import manifest as mf
from ..errors import AugsplitError, DatasetError
from ..limits import MAX_METADATA_BYTES
from ..plan.settings import Settings, settings_of
from ..spec import Spec, parse_spec, spec_hash
from . import layout as lay

SCHEMAS = {lay.MANIFEST_DIR: mf.IMAGE_SCHEMA, lay.DISTRACTOR_DIR: mf.DISTRACTOR_SCHEMA}
LAYOUT_KEYS = ("shard_size", "store", "format", "quality", "png_deflate", "png_level")  # the options that decide the bytes on disk
# what a folder made before a layout key existed did, where that is known: PNGs were deflated by zlib
LAYOUT_BEFORE = {"png_deflate": "zlib"}
PNG_KEYS = ("png_deflate", "png_level")  # the layout keys only a PNG dataset's bytes depend on
DEFAULT_SHARD_SIZE = 500


@dataclass(frozen=True)
class Part:
    """One committed Parquet part: which table and split, which shard, where, how many rows."""

    table: str
    split: str
    shard: int
    path: Path
    rows: int


@dataclass(frozen=True, eq=False)
class DatasetFolder:
    """An opened dataset folder. Every field was checked by `open_dataset`."""

    root: Path
    spec: Spec
    spec_hash: str
    base_dir: Path  # the folder the spec's relative paths resolve in
    layout: dict  # shard_size, store, format, quality; {} in folders made before it was recorded
    summary: dict | None  # dataset.json; None while the dataset is unfinished
    parts: tuple[Part, ...]
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def complete(self) -> bool:
        return self.summary is not None

    @property
    def splits(self) -> tuple[str, ...]:
        """Split names in spec order (the order fixes every image's seed key)."""
        return tuple(self.spec.splits)

    @property
    def settings(self) -> Settings:
        """The spec's settings as plain values (the folder reads spec.json: the spec's boundary)."""
        if "settings" not in self._cache:
            self._cache["settings"] = settings_of(self.spec)
        return self._cache["settings"]

    @property
    def axis_names(self) -> tuple[str, ...]:
        """The axes the spec varies, in its order."""
        return tuple(self.spec.axes)

    @property
    def channels(self) -> int:
        return self.settings.render.channels

    @property
    def hw(self) -> tuple[int, int]:
        return self.spec.canvas.height, self.spec.canvas.width

    @property
    def shard_size(self) -> int:
        if self.layout.get("shard_size"):
            return int(self.layout["shard_size"])
        # folders from before the layout was recorded: the largest first part is a whole shard
        first = [p.rows for p in self.parts if p.table == lay.MANIFEST_DIR and p.shard == 0]
        return max(first) if first else DEFAULT_SHARD_SIZE

    @property
    def png_setting(self) -> tuple[str, int]:
        """The deflate library and level of the folder's PNGs: what its layout records (a folder
        from before `png_deflate` was recorded: zlib's, LAYOUT_BEFORE), else, where it records
        none (a JPEG or WebP dataset), the default for its background. A --store none dataset's
        images are re-made and encoded with it (export), as a --store files run stored them.
        Read once per opened folder."""
        if "png_setting" not in self._cache:
            from . import png

            recorded = {**LAYOUT_BEFORE, **self.layout}
            deflate, level = recorded.get("png_deflate"), recorded.get("png_level")
            try:  # a JPEG or WebP run records neither: the background's library at its default level
                deflate, level = png.png_setting(deflate, None if deflate is None else level,
                                                 self.settings.render.background)
                known = type(level) is int and level in png.DEFLATES[deflate].levels
            except (KeyError, TypeError):  # a library that is not one (or not even a name)
                known = False
            if not known:
                raise DatasetError(f"unknown PNG setting in the layout: png_deflate {deflate!r}, png_level {level!r}",
                                   where=str(self.root / lay.SPEC_FILE))
            self._cache["png_setting"] = (deflate, level)
        return self._cache["png_setting"]

    @property
    def built(self):
        """The spec's Built (object source, background, plan), made on first use."""
        if "built" not in self._cache:
            from ..build import build

            self._cache["built"] = build(self.spec, self.base_dir)
        return self._cache["built"]

    @property
    def box(self):
        """The folder as a closed box for the image paths its manifest names."""
        if "box" not in self._cache:
            from .images import Box

            self._cache["box"] = Box(self.root)
        return self._cache["box"]

    @property
    def parts_box(self):
        """The folder as a closed box for its Parquet parts (read through dataset/boxfs.py)."""
        if "parts_box" not in self._cache:
            self._cache["parts_box"] = part_box(self.root)
        return self._cache["parts_box"]

    @property
    def plan(self):
        return self.built.plan

    def parts_of(self, table: str = lay.MANIFEST_DIR, splits=None) -> list[Part]:
        """The parts of a table, splits in spec order, shards in order."""
        order = {s: i for i, s in enumerate(self.splits)}
        want = None if splits is None else set(splits)
        got = [p for p in self.parts if p.table == table and (want is None or p.split in want)]
        return sorted(got, key=lambda p: (order[p.split], p.shard))

    def __getstate__(self):
        # sent to loader worker processes: each builds its own objects when it needs them
        state = dict(self.__dict__)
        state["_cache"] = {}
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)

    def __repr__(self) -> str:
        done = "complete" if self.complete else "unfinished"
        return f"open_dataset({str(self.root)!r})  # {done}, spec {self.spec_hash}, splits {list(self.splits)}"


def read_metadata(root: Path, name: str, box=None) -> str:
    """The text of a dataset's own file `name` (spec.json, dataset.json), read through the
    folder's `part_box` (made here if not given): a file linked out of it is refused, never read."""
    box = part_box(root) if box is None else box
    return box.naming("metadata").read(name, MAX_METADATA_BYTES, str(Path(root) / name)).decode("utf-8")


def read_spec_doc(root: Path, box=None) -> dict:
    """spec.json as a dict (spec, spec_hash, base_dir, layout); one-line errors naming it."""
    spec_file = Path(root) / lay.SPEC_FILE
    if not os.path.lexists(spec_file):  # anything else there (a FIFO, a folder, a link) the box judges
        raise DatasetError(f"not an augsplit dataset (no {lay.SPEC_FILE})", where=str(root))
    try:
        doc = json.loads(read_metadata(root, lay.SPEC_FILE, box))
    except (OSError, ValueError) as exc:
        raise DatasetError(f"unreadable {lay.SPEC_FILE}: {exc}", where=str(spec_file)) from None
    if not isinstance(doc, dict) or not isinstance(doc.get("spec"), dict) or not isinstance(doc.get("spec_hash"), str):
        raise DatasetError(f"unreadable {lay.SPEC_FILE}: it needs 'spec' and 'spec_hash'", where=str(spec_file))
    return doc


def _read_summary(root: Path, box) -> dict | None:
    path = root / lay.SUMMARY_FILE
    if not path.exists():
        return None
    try:
        summary = json.loads(read_metadata(root, lay.SUMMARY_FILE, box))
    except (OSError, ValueError) as exc:
        raise DatasetError(f"unreadable {lay.SUMMARY_FILE}: {exc}", where=str(path)) from None
    if not isinstance(summary, dict) or not isinstance(summary.get("splits"), dict):
        raise DatasetError(f"unreadable {lay.SUMMARY_FILE}: it has no 'splits'", where=str(path))
    return summary


def open_dataset(path: str | Path, *, allow_incomplete: bool = False) -> DatasetFolder:
    """Open and check a dataset folder (see the module docstring for the policy)."""
    root = Path(path)
    if not root.is_dir():
        raise DatasetError("no such dataset folder", where=str(root))
    box = part_box(root)  # one box for every file of the folder this reads: the folder resolved once
    doc = read_spec_doc(root, box)
    spec_file = root / lay.SPEC_FILE
    try:
        spec = parse_spec(doc["spec"], source=str(spec_file))
    except AugsplitError as exc:
        raise DatasetError(f"unreadable {lay.SPEC_FILE}: {exc}", where=str(spec_file)) from None
    recorded = doc["spec_hash"]
    if spec_hash(spec) != recorded:
        raise DatasetError(f"{lay.SPEC_FILE} says hash {recorded} but its spec hashes to {spec_hash(spec)}",
                           where=str(spec_file))
    summary = _read_summary(root, box)
    if summary is None and not allow_incomplete:
        raise DatasetError("the dataset is incomplete (no dataset.json): finish it with `augsplit generate SPEC "
                           "--out DIR --resume` (or `--finalize` after a job array) before using it", where=str(root))
    if summary is not None and summary.get("spec_hash") != recorded:
        raise DatasetError(f"{lay.SUMMARY_FILE} is of spec {summary.get('spec_hash')}, but {lay.SPEC_FILE} is spec "
                           f"{recorded}: a mixed folder; regenerate it", where=str(root / lay.SUMMARY_FILE))
    layout = doc.get("layout") if isinstance(doc.get("layout"), dict) else {}
    parts = tuple(p for table in lay.TABLES for p in scan_parts(root, table, recorded, tuple(spec.splits), box))
    folder = DatasetFolder(root, spec, recorded, Path(doc.get("base_dir") or root), layout, summary, parts)
    folder._cache["parts_box"] = box
    if summary is not None:
        totals = {}
        for name in spec.splits:
            entry = summary["splits"].get(name)
            if not isinstance(entry, dict) or not isinstance(entry.get("images"), int):
                raise DatasetError(f"{lay.SUMMARY_FILE} does not list split '{name}' of the spec", where=str(root))
            totals[name] = entry["images"]
        check_parts(folder, totals)
    return folder


def part_box(root: Path):
    """A closed box of the dataset folder for its own files: pyarrow reads a Parquet part only
    through it (dataset/boxfs.py), and spec.json and dataset.json are read through it, so only
    files inside the folder are read."""
    from .images import Box

    return Box(root, "Parquet part", literal=True)


def scan_parts(root: Path, table: str, recorded_hash: str, splits: tuple[str, ...], box=None) -> list[Part]:
    """Every part of a table, each checked: a split of the spec, this spec's hash, the declared
    schema. Reads only the footers, through `box` (default: `part_box(root)`)."""
    from .boxfs import open_part

    box = part_box(root) if box is None else box
    out = []
    for path in lay.part_files(root, table):
        split = lay.split_of(path)
        if split not in splits:
            raise DatasetError(f"a part of split '{split}', which the spec does not have (it has "
                               f"{', '.join(splits)}): a mixed folder", where=str(path))
        try:
            with open_part(box, path) as f:
                meta = pq.ParquetFile(f).metadata
            schema = meta.schema.to_arrow_schema()
        except (OSError, pa.ArrowException) as exc:
            raise DatasetError(f"unreadable Parquet part (truncated or not Parquet): {_first_line(exc)}",
                               where=str(path)) from None
        got = (schema.metadata or {}).get(mf.META_HASH, b"").decode() or "none"
        if got != recorded_hash:
            raise DatasetError(f"this part was made by spec {got}, but the folder's {lay.SPEC_FILE} is spec "
                               f"{recorded_hash}; parts of another spec cannot be mixed in (regenerate the dataset)",
                               where=str(path))
        check_schema(schema, SCHEMAS[table], str(path))
        out.append(Part(table, split, lay.shard_of(path), path, meta.num_rows))
    return out


def check_schema(schema: pa.Schema, declared: pa.Schema, where: str) -> None:
    """Every declared column is there with its declared type (extra columns are ignored; a
    column added later, `manifest.ADDED_COLUMNS`, may be absent from an older part)."""
    for f in declared:
        i = schema.get_field_index(f.name)
        if i < 0 and f.name in mf.ADDED_COLUMNS:
            continue
        if i < 0:
            raise DatasetError(f"the part has no column '{f.name}' (declared in augsplit.manifest)", where=where)
        if not schema.field(i).type.equals(f.type):
            raise DatasetError(f"column '{f.name}' is {schema.field(i).type}, declared {f.type}", where=where)


def check_parts(folder: DatasetFolder, totals: dict[str, int]) -> None:
    """Refuse parts that no shard of a dataset of these split sizes makes, and manifest parts
    whose row count is not their shard's (another shard size or spec): their rows would pass
    for other images."""
    size = folder.shard_size
    expected = lay.expected_parts(totals, size)
    for p in folder.parts:
        if (p.split, p.shard) not in expected:
            raise DatasetError(f"a {p.table} part that no shard of this spec makes (shard size {size}, "
                               f"{totals[p.split]} images in split {p.split}): another shard size or spec?",
                               where=str(p.path))
        rows = min(size, totals[p.split] - p.shard * size)
        if p.table == lay.MANIFEST_DIR and p.rows != rows:
            raise DatasetError(f"the part holds {p.rows} rows where its shard has {rows} (shard size {size}): "
                               "a part of another shard size?", where=str(p.path))


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__
