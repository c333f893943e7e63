"""Splits written back in the user's format, and read back for the audit.

COCO: one JSON per split (its images, their annotations, every category; ids kept). YOLO: one
list of image paths per split (`<split>.txt`, absolute paths). VOC: one image-set list per
split (`<split>.txt`, image ids). Each folder also gets `splits.csv` (every image and its
split) and `augsplit-splits.json`, the list of files augsplit wrote there: a rerun replaces
(or removes) only those and refuses to touch anything else. A table gets its split column.
"""

from __future__ import annotations

import io
import json
import os
from pathlib import Path

import numpy as np
import pandas as pd

from ..assign import NONE
from ..errors import DatasetError
from ..io import write_text_atomic
from .boxes import Objects, dataset_box, read_file
from .coco import MAX_BYTES as COCO_MAX_BYTES
from .coco import coco_id
from .placement import Placed

MARKER = "augsplit-splits.json"
SPLITS_CSV = "splits.csv"
LIST_SUFFIX = {"coco": ".json", "yolo": ".txt", "voc": ".txt"}
NOT_LISTS = ("audit.json", "score.json")  # reports a folder of split lists may also hold


def default_out(path: str | Path, kind: str) -> Path:
    """Where per-split files go by default: `<input>.splits` beside the input."""
    p = Path(path).absolute()  # '.' has no name of its own
    return p.with_name((p.stem if p.is_file() else p.name) + ".splits")


def write_result(result, path: str | Path, out: str | Path | None = None, replace_split: bool = False) -> list[Path]:
    """Write what split_input returned: a table with its split column(s), or per-split files."""
    from ..assign import default_output
    from ..io import check_target, is_stdout, refuse_input
    from .table import output_kind, write_table

    if isinstance(result, Placed) and result.source.kind != "table":
        return write_folder(result, _folder_out(out, result.source.kind) if out else default_out(path, result.source.kind))
    table = result.table(replace_split) if isinstance(result, Placed) else result.table
    target = out or default_output(path)
    refuse_input(target, path)  # the input itself, a symlink, an unknown extension: refused
    if not is_stdout(target):
        check_target(target)
    output_kind(target)
    write_table(table, target)
    return [target]


def _folder_out(out, kind: str) -> Path:
    """--out for per-split files: a folder (not '-', a link or a file), whose name does not
    look like a table's (a COCO, YOLO or VOC input is split into a folder of files)."""
    from ..io import check_folder_target
    from .table import PARQUET_SUFFIXES, TEXT_SUFFIXES

    p = check_folder_target(out)
    if not p.exists() and p.suffix.lower() in set(PARQUET_SUFFIXES) | set(TEXT_SUFFIXES):
        raise DatasetError(f"a {kind.upper()} input is split into a folder of per-split files and splits.csv; "
                           f"--out names that folder, not a {p.suffix} table", where=str(p))
    return p


def write_folder(placed: Placed, out: str | Path) -> list[Path]:
    """Per-split files for COCO / YOLO / VOC input, splits.csv and the marker (see module doc)."""
    src = placed.source
    out = Path(out)
    suffix = LIST_SUFFIX[src.kind]
    images = placed.images
    names = [f"{s}{suffix}" for s in placed.splits] + [SPLITS_CSV]
    clash = [s for s in placed.splits if f"{s}{suffix}" in (MARKER, SPLITS_CSV)]
    if clash:  # its list would be written over augsplit's own record of the folder, or under it
        raise DatasetError(f"a split named '{clash[0]}' would write {clash[0]}{suffix}, the name of augsplit's own "
                           "file in this folder; rename the split", where=f"splits.{clash[0]}")
    ours = _prepare(out, names)
    for n in sorted(set(names) | ours | {MARKER}):  # written, replaced or removed below
        if (out / n).exists() and os.path.samefile(out / n, src.path):
            raise DatasetError("is the input; augsplit never replaces its input, give another --out", where=str(out / n))
    written = []
    for s in placed.splits:
        sel = images[images["split"] == s]
        path = out / f"{s}{suffix}"
        if src.kind == "coco":
            from .coco import write_coco

            write_coco(src.raw, sel["image_id"].tolist(), path)
        elif src.kind == "yolo":
            write_text_atomic(path, "".join(f"{(src.root / f).resolve()}\n" for f in sel["file"]))
        else:
            write_text_atomic(path, "".join(f"{i}\n" for i in sel["image_id"]))
        written.append(path)
    write_text_atomic(out / SPLITS_CSV, images[["image_id", "file", "split", "n_objects", "mixed"]].to_csv(index=False))
    written.append(out / SPLITS_CSV)
    for stale in sorted(ours - set(names)):  # files an earlier run wrote that this one does not
        (out / stale).unlink(missing_ok=True)
    counts = {k: int(v) for k, v in images["split"].value_counts().items()}
    write_text_atomic(out / MARKER, json.dumps({"files": names, "format": src.kind, "source": str(src.path),
                                                "mixed": placed.mixed_rule, "images": counts}, indent=1))
    return written


def _prepare(out: Path, names: list[str]) -> set[str]:
    """Create `out` if needed; return the files an earlier run wrote there; refuse to replace
    anything else (or anything that is not a regular file)."""
    if out.exists() and not out.is_dir():
        raise DatasetError("exists and is not a folder", where=str(out))
    ours: set[str] = set()
    marker = out / MARKER
    if marker.is_file() and not marker.is_symlink():
        try:
            ours = {str(n) for n in json.loads(marker.read_text(encoding="utf-8"))["files"] if "/" not in str(n)}
        except (ValueError, KeyError, TypeError):
            raise DatasetError("unreadable list of the files augsplit wrote here", where=str(marker)) from None
    for n in names + [MARKER]:
        q = out / n
        if q.is_symlink() or (q.exists() and not q.is_file()):
            raise DatasetError("exists and is not a regular file; choose another --out", where=str(q))
        if q.exists() and n not in ours and n != MARKER:
            raise DatasetError("exists and was not written by augsplit; choose another --out", where=str(q))
    if marker.exists() and not ours and any((out / n).exists() for n in names):
        raise DatasetError("unreadable list of the files augsplit wrote here", where=str(marker))
    out.mkdir(parents=True, exist_ok=True)
    return ours


# ---- reading a split assignment back ----------------------------------------------------------

def read_assignment(path: str | Path, objs: Objects) -> np.ndarray:
    """The split of every image of `objs` (in `objs.images` order) from: a folder `assign` wrote
    (its splits.csv), a folder of per-split files (`<split>.json` COCO files or `<split>.txt`
    lists of image ids or paths), or a CSV/Parquet table with `split` and `image_id` or `file`.
    Images the assignment does not name get 'none'."""
    p = Path(path)
    if p.is_dir() and (p / MARKER).is_file():
        # read inside the folder only
        data = read_file(dataset_box(p, "splits folder"), p / SPLITS_CSV, COCO_MAX_BYTES, "splits table")
        try:
            table = pd.read_csv(io.BytesIO(data), dtype=str, keep_default_na=False, encoding="utf-8")
        except (UnicodeDecodeError, ValueError, pd.errors.ParserError) as exc:
            why = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise DatasetError(f"unreadable splits table: {why}", where=str(p / SPLITS_CSV)) from None
        return _from_table(table, objs, str(p / SPLITS_CSV))
    if p.is_dir():
        return _from_lists(p, objs)
    if p.is_file():
        from .table import read_table

        # ids and file names as written (007 stays 007, as the annotations read it)
        return _from_table(read_table(p, text=("image_id", "file", "file_name", "split")), objs, str(p))
    raise DatasetError("no such file or folder", where=str(p))


def _key_maps(objs: Objects) -> dict[str, dict[str, int | None]]:
    """The names an image may be listed by, one map per kind: its id; its file as written or
    as an absolute path; the file's stem. A name two images share maps to None."""
    maps: dict[str, dict[str, int | None]] = {"image id": {}, "file": {}, "file stem": {}}

    def put(kind: str, key: str, k: int) -> None:
        m = maps[kind]
        m[key] = k if m.get(key, k) == k else None

    for k, (iid, f) in enumerate(zip(objs.images["image_id"], objs.images["file"])):
        put("image id", str(iid), k)
        put("file", str(f), k)
        put("file", str((objs.root / str(f)).resolve()), k)
        put("file stem", Path(str(f)).stem, k)
    return maps


def _positions(names: list[str], objs: Objects, kinds: tuple[str, ...], where: str) -> list[int]:
    """The position of each listed image, every name read as the first of `kinds` (image id,
    file, file stem) that names all of them: one list is never read half as ids and half as
    file names, so an id never lands on the image whose file is called that."""
    maps = _key_maps(objs)
    fewest = None
    for kind in kinds:
        m = maps[kind]
        miss = [n for n in names if n not in m]
        if not miss:
            shared = [n for n in names if m[n] is None]
            if shared:
                raise DatasetError(f"{len(shared)} listed {kind}s name more than one image (e.g. "
                                   f"{', '.join(shared[:3])})", where=where)
            return [m[n] for n in names]
        fewest = miss if fewest is None or len(miss) < len(fewest) else fewest
    _check_missing(fewest or [], where)
    return []


def _from_table(df: pd.DataFrame, objs: Objects, where: str) -> np.ndarray:
    if "split" not in df.columns:
        raise DatasetError("no 'split' column", where=where)
    key = next((c for c in ("image_id", "file", "file_name") if c in df.columns), None)
    if key is None:
        raise DatasetError("no 'image_id' or 'file' column to match images by", where=where)
    kinds = ("image id",) if key == "image_id" else ("file", "file stem")
    out = np.full(len(objs.images), NONE, dtype=object)
    for i, s in zip(_positions(df[key].astype(str).tolist(), objs, kinds, where), df["split"].astype(str)):
        out[i] = s
    return out


def _from_lists(folder: Path, objs: Objects) -> np.ndarray:
    out = np.full(len(objs.images), NONE, dtype=object)
    # per-split lists only: not hidden files, not augsplit's own reports or markers (audit.json, ...)
    # anything but a folder that is named like a list is read through the box below, which
    # refuses (in one line) a FIFO, device or link out, rather than passing over it unread
    files = sorted(f for f in folder.iterdir() if not f.is_dir() and f.suffix in (".json", ".txt")
                   and not f.name.startswith(".") and f.name not in NOT_LISTS and not f.name.startswith("augsplit-"))
    if not files:
        raise DatasetError("no per-split files (<split>.json or <split>.txt) found", where=str(folder))
    box = dataset_box(folder, "splits folder")  # a list linked out of the folder is refused, not read
    for f in files:
        try:
            text = read_file(box, f, COCO_MAX_BYTES, "split list").decode("utf-8")
        except UnicodeDecodeError:
            raise DatasetError("not UTF-8 text", where=str(f)) from None
        if f.suffix == ".json":
            try:
                names = [str(coco_id(im["id"])) for im in json.loads(text)["images"]]
            except (ValueError, KeyError, TypeError):
                raise DatasetError("not a COCO file with an 'images' list", where=str(f)) from None
            kinds: tuple[str, ...] = ("image id",)
        else:
            names = [s.strip() for s in text.splitlines() if s.strip()]
            kinds = ("image id", "file", "file stem")
        for i in _positions(names, objs, kinds, str(f)):
            out[i] = f.stem
    return out


def _check_missing(miss: list, where: str) -> None:
    if miss:
        raise DatasetError(f"{len(miss)} listed images are not in the dataset (e.g. {', '.join(miss[:3])})", where=where)
