"""Audit inputs: column maps, axis declarations, table sources (DataFrame, or a CSV, TSV,
Parquet file or folder read by augsplit.formats.table, streamed) and image loaders. Every
problem is a one-line DatasetError naming the column, axis, split, file or rows."""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

import numpy as np
import pandas as pd

from ..dataset import layout as lay
from ..dataset import open_dataset
from ..errors import DatasetError
from ..formats.table import Table, open_table_file
from ..space.axes import LEVELS, LOG, Axis
from .proximity import AxisScale

BBOX_COLUMNS = ("bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1")
ImageLoader = Callable[[int], "np.ndarray | None"]


def apply_column_map(df: pd.DataFrame, mapping: dict[str, str] | None) -> pd.DataFrame:
    """Rename the table's columns to augsplit's names. `mapping` is {augsplit name: table column}.

    Raises DatasetError naming the first mapped column the table lacks.
    """
    if not mapping:
        return df
    _check_mapped(mapping, df.columns)
    # a mapped column replaces a same-named one the table already has
    shadowed = [dst for dst, src in mapping.items() if dst != src and dst in df.columns and dst not in mapping.values()]
    return df.drop(columns=shadowed).rename(columns={src: dst for dst, src in mapping.items() if src != dst})


def _check_mapped(mapping: dict[str, str], columns) -> None:
    have = list(columns)
    for dst, src in mapping.items():
        if src not in have:
            raise DatasetError(f"column {src!r} is not in the table (columns: {_short(have)})",
                               where=f"column_map.{dst}")


def _short(names, k: int = 12) -> str:
    names = [str(n) for n in names]
    return ", ".join(names[:k]) + (f", ... ({len(names)} in all)" if len(names) > k else "")


# ---- axes ---------------------------------------------------------------------------------

def axis_scales(axes: dict, data: pd.DataFrame | None = None) -> tuple[list[AxisScale], list[str]]:
    """Axis declarations -> AxisScale list (and notes on ranges taken from the data).

    Each value is (lo, hi, periodic), optionally with a 4th item "log"; or an augsplit
    `Axis`; or an `AxisScale`. A non-periodic axis with lo/hi None takes the data's range; a
    periodic one must give its period.
    """
    scales, notes = [], []
    for name, spec in axes.items():
        if isinstance(spec, AxisScale):
            scales.append(spec)
        elif isinstance(spec, Axis):
            scales.append(_scale_of_axis(name, spec))
        else:
            scales.append(_scale_of_tuple(name, spec, data, notes))
    return scales, notes


def _scale_of_axis(name: str, spec: Axis) -> AxisScale:
    if spec.measure == LOG:
        return AxisScale(name, spec.lo, spec.hi, False, True)
    if spec.measure == LEVELS:
        # the table holds level values, so the range is that of the values
        lv = [float(v) for v in spec.levels] or [0.0]
        lo_v, hi_v = min(lv), max(lv)
        return AxisScale(name, lo_v, hi_v if hi_v > lo_v else lo_v + 1.0, False)
    return AxisScale(name, float(spec.lo), float(spec.hi), spec.circular)


def _scale_of_tuple(name: str, spec, data: pd.DataFrame | None, notes: list) -> AxisScale:
    """(lo, hi, periodic[, "log" | "linear"]); a missing bound of a non-periodic axis is taken
    from the data (noted in `notes`)."""
    where = f"axes.{name}"
    try:
        items = tuple(spec)
    except TypeError:
        raise DatasetError(f"expected (lo, hi, periodic), got {spec!r}", where=where) from None
    if len(items) not in (3, 4):
        raise DatasetError(f"expected (lo, hi, periodic[, 'log']), got {spec!r}", where=where)
    lo, hi, periodic = items[:3]
    log = len(items) == 4 and items[3] == "log"
    if len(items) == 4 and items[3] not in ("log", "linear", None):
        raise DatasetError(f"4th item must be 'log' or 'linear', got {items[3]!r}", where=where)
    periodic = bool(periodic)
    if lo is None or hi is None:
        lo, hi = _range_from_data(name, lo, hi, periodic, data, where)
        notes.append(f"{name}: range [{lo:g}, {hi:g}] taken from the data")
    try:
        lo, hi = float(lo), float(hi)
    except (TypeError, ValueError):
        raise DatasetError(f"range bounds must be numbers, got ({lo!r}, {hi!r})", where=where) from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        raise DatasetError(f"range [{lo:g}, {hi:g}] is empty or not finite", where=where)
    if log and lo <= 0:
        raise DatasetError(f"log axis needs a positive range, got [{lo:g}, {hi:g}]", where=where)
    return AxisScale(name, lo, hi, periodic, log)


def _range_from_data(name: str, lo, hi, periodic: bool, data: pd.DataFrame | None, where: str):
    if periodic:
        raise DatasetError("circular axis has no period: give its range (lo, hi), e.g. (0, 360)", where=where)
    if data is None or name not in data:
        raise DatasetError("no range given and no data to take it from", where=where)
    v = pd.to_numeric(data[name], errors="coerce").to_numpy(float)
    v = v[np.isfinite(v)]
    if len(v) == 0:
        raise DatasetError("no range given and no finite values to take it from", where=where)
    lo = float(v.min()) if lo is None else lo
    hi = float(v.max()) if hi is None else hi
    if hi <= lo:
        hi = lo + 1.0  # a constant column: any positive span gives distance 0 on it
    return lo, hi


# ---- table sources -----------------------------------------------------------------------

@dataclass(frozen=True)
class TableSource:
    """Where the table comes from: a DataFrame in memory, or a file or folder read through
    augsplit.formats.table (streamed: Parquet by row group, CSV/TSV in chunks).

    `mapping` renames source columns to augsplit names. `root` resolves image paths.
    """

    frame: pd.DataFrame | None
    table: Table | None
    kind: str  # "frame", "parquet", "csv"
    columns: tuple[str, ...]  # augsplit names available
    mapping: dict
    root: Path | None

    def read(self, columns: list[str], batch_rows: int = 1 << 17, progress: bool = False) -> pd.DataFrame:
        """The named columns (those present) of every row."""
        cols = [c for c in columns if c in self.columns]
        if self.kind == "frame":
            return self.frame[cols].reset_index(drop=True)
        parts = list(self.iter_batches(cols, batch_rows, progress))
        if not parts:
            return pd.DataFrame({c: [] for c in cols})
        return pd.concat(parts, ignore_index=True)

    def iter_batches(self, columns: list[str], batch_rows: int = 1 << 14,
                     progress: bool = False) -> Iterator[pd.DataFrame]:
        """The named columns in row order, a bounded batch at a time (flat memory)."""
        cols = [c for c in columns if c in self.columns]
        if self.kind == "frame":
            for s in range(0, len(self.frame), batch_rows):
                yield self.frame[cols].iloc[s : s + batch_rows].reset_index(drop=True)
            return
        from ..progress import bar as tqdm

        inverse = {dst: src for dst, src in self.mapping.items()}
        to_ours = {inverse.get(c, c): c for c in cols}
        with tqdm(total=None, unit="rows", disable=not progress, desc="reading") as bar:
            for df in self.table.iter_batches(list(to_ours), batch_rows):
                bar.update(len(df))
                yield df.rename(columns=to_ours)[cols]


def open_table(table, column_map: dict | None = None, root=None) -> TableSource:
    """A DataFrame, a CSV/TSV file, a Parquet file, or a folder of Parquet files (an augsplit
    dataset folder, whose rows are under manifest/) -> TableSource. Column map applied (checked)."""
    mapping = dict(column_map or {})
    if isinstance(table, pd.DataFrame):
        df = apply_column_map(table, mapping)
        return TableSource(df.reset_index(drop=True), None, "frame", tuple(map(str, df.columns)), {},
                           Path(root) if root else None)
    path = Path(table)
    if path.is_dir() and (path / lay.SPEC_FILE).exists():
        open_dataset(path)  # an augsplit dataset folder is checked first: unfinished or mixed ones are refused
    scan = path / lay.MANIFEST_DIR if path.is_dir() and (path / lay.MANIFEST_DIR).is_dir() else path
    t = open_table_file(scan)
    _check_mapped(mapping, t.columns)
    cols = _mapped_names(list(t.columns), mapping)
    base = path if path.is_dir() else path.parent
    return TableSource(None, t, t.kind, tuple(cols), mapping, Path(root) if root else base)


def _mapped_names(names: list[str], mapping: dict) -> list[str]:
    rename = {src: dst for dst, src in mapping.items()}
    return list(dict.fromkeys(rename.get(n, n) for n in names))


# ---- images ------------------------------------------------------------------------------

def decode_image(data: bytes, where: str) -> np.ndarray:
    """Encoded bytes (PNG, JPEG, WebP ...) -> RGB(A) or grey uint8 array."""
    from ..dataset.images import decode_any

    return decode_any(data, where)


def read_image(box, rel: str) -> np.ndarray:
    """The image file a table row names, read inside the table's folder through its closed
    Box (augsplit.dataset.images: no path out of it, regular files only, a size limit)."""
    from ..dataset.images import FOREIGN_MAX_BYTES, decode_any

    return decode_any(box.read(rel, FOREIGN_MAX_BYTES, where=rel), where=rel)


def check_files_exist(files: pd.Series, root: Path | None, rows: np.ndarray) -> None:
    """Raise one DatasetError naming the first listed image missing on disk, and the count."""
    from ..dataset.images import Box, ImageError

    names = files.astype(str).to_numpy()
    listed = np.flatnonzero((names != "") & (names != "None") & (names != "nan"))
    base = root or Path(".")
    missing = [i for i in listed if not os.path.exists(base / names[i])]
    if missing:
        first = missing[0]
        raise DatasetError(f"{len(missing)} listed image(s) missing on disk (first at row {int(rows[first])})",
                           where=str(base / names[first]))
    box = Box(base)
    for i in listed:
        try:
            box.resolve(names[i])
        except ImageError as exc:
            raise DatasetError(f"row {int(rows[i])}: {exc.message}", where=str(base)) from None
