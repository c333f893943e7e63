"""The rows of a dataset's tables, read through `pyarrow.dataset` with hive partitioning.

Only the parts `open_dataset` checked are read (this spec, the declared schema); rows come in
spec order of splits and image order within a split. A part that fails while being read is a
one-line DatasetError naming it, never a traceback.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .. import manifest as mf
from ..errors import DatasetError
from . import layout as lay
from .boxfs import filesystem, open_part
from .folder import SCHEMAS, DatasetFolder, Part, open_dataset

if TYPE_CHECKING:
    import pandas as pd
    import pyarrow.dataset as pds

# pyarrow.dataset and pandas (which it imports: 0.5 s) are imported where rows are read as a
# table, so a generation run, which only writes parts and reads single columns, needs neither
PART_COLUMN, OFFSET_COLUMN = "_part", "_offset"  # with positions=True: which part, which row of it


def table_schema(table: str) -> pa.Schema:
    """The declared schema of a table with its partition column."""
    return SCHEMAS[table].append(pa.field(mf.PARTITION, pa.string()))


def _dataset(folder: DatasetFolder, table: str, splits, parts=None) -> tuple[pds.Dataset | None, list[Part]]:
    import pyarrow.dataset as pds

    parts = folder.parts_of(table, splits) if parts is None else list(parts)
    if not parts:
        return None, parts
    dset = pds.dataset([str(p.path) for p in parts], schema=table_schema(table), format="parquet",
                       filesystem=filesystem(folder.parts_box),
                       partitioning=pds.partitioning(pa.schema([(mf.PARTITION, pa.string())]), flavor="hive"),
                       partition_base_dir=str(folder.root / table))
    return dset, parts


def _columns(table: str, columns) -> list[str]:
    names = table_schema(table).names
    if columns is None:
        return names
    unknown = [c for c in columns if c not in names]
    if unknown:
        raise DatasetError(f"no column {unknown[0]!r} in the {table} table (see augsplit.manifest)", where=table)
    return list(dict.fromkeys(columns))


def _fragments(dset: pds.Dataset, parts: list[Part]):
    by_path = {str(p.path): (k, p) for k, p in enumerate(parts)}
    for frag in dset.get_fragments():
        yield by_path[frag.path], frag


def _unreadable(part: Part, exc: BaseException) -> DatasetError:
    text = str(exc).strip()
    return DatasetError(f"unreadable Parquet part: {text.splitlines()[0] if text else type(exc).__name__}",
                        where=str(part.path))


def read_rows(folder: DatasetFolder, table: str = lay.MANIFEST_DIR, *, splits=None, columns=None,
              positions: bool = False) -> pd.DataFrame:
    """Rows of a table as a DataFrame (`split` a plain string column), splits in spec order,
    image order within each. `positions` adds `_part` (index into `folder.parts_of(table,
    splits)`) and `_offset` (row within that part)."""
    import pandas as pd

    cols = _columns(table, columns)
    dset, parts = _dataset(folder, table, splits)
    tables, which = [], []
    if dset is not None:
        for (k, part), frag in _fragments(dset, parts):
            try:
                t = frag.to_table(columns=cols, schema=dset.schema)
            except (OSError, pa.ArrowException) as exc:
                raise _unreadable(part, exc) from None
            if t.num_rows != part.rows:
                raise DatasetError(f"the part holds {t.num_rows} rows but its footer says {part.rows}", where=str(part.path))
            tables.append(t)
            which.append(k)
    if not tables:
        empty = table_schema(table).empty_table().select(cols).to_pandas()
        if positions:
            empty[PART_COLUMN] = pd.Series(dtype=np.int64)
            empty[OFFSET_COLUMN] = pd.Series(dtype=np.int64)
        return empty
    # one conversion to pandas for all parts: per part it cost 1-2 ms, 2,000 parts at a million rows
    df = pa.concat_tables(tables).to_pandas()
    if positions:
        sizes = np.array([t.num_rows for t in tables], np.int64)
        df[PART_COLUMN] = np.repeat(np.array(which, np.int64), sizes)
        df[OFFSET_COLUMN] = np.arange(len(df)) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    if "index" in df.columns and mf.PARTITION in df.columns:
        order = df[mf.PARTITION].map({s: i for i, s in enumerate(folder.splits)}).to_numpy()
        index = df["index"].fillna(-1).to_numpy(np.int64)
        df = df.iloc[np.lexsort((index, order))].reset_index(drop=True)
    return df


def iter_batches(folder: DatasetFolder, table: str = lay.MANIFEST_DIR, *, splits=None, columns=None,
                 batch_rows: int = 1 << 14, parts=None, arrow: bool = False) -> Iterator[pd.DataFrame]:
    """The same rows as `read_rows`, part by part in bounded batches (flat memory); `parts`
    (of `folder.parts_of(table)`) reads only those; `arrow` yields pyarrow RecordBatches
    (no pandas conversion, for row-at-a-time work through `to_pylist`)."""
    cols = _columns(table, columns)
    dset, parts = _dataset(folder, table, splits, parts)
    if dset is None:
        return
    for (_k, part), frag in _fragments(dset, parts):
        try:
            for batch in frag.to_batches(columns=cols, schema=dset.schema, batch_size=batch_rows):
                yield batch if arrow else batch.to_pandas()
        except (OSError, pa.ArrowException) as exc:
            raise _unreadable(part, exc) from None


def read_column(folder: DatasetFolder, part: Part, column: str) -> pa.Array:
    """One column of one part (for example its image bytes, which loaders cache per part)."""
    try:
        # ParquetFile, not read_table: the latter imports pyarrow.dataset and pandas (0.5 s)
        with open_part(folder.parts_box, part.path) as f:
            return pq.ParquetFile(f).read(columns=[column]).column(column).combine_chunks()
    except (OSError, pa.ArrowException) as exc:
        raise _unreadable(part, exc) from None


def non_null(folder: DatasetFolder, part: Part, column: str) -> np.ndarray:
    """Which rows of a part hold a value in `column`, from the row groups' null counts where they
    settle it (a dataset has one store mode), so the values themselves are not read."""
    try:
        with open_part(folder.parts_box, part.path) as f:
            return _non_null(pq.ParquetFile(f), column)
    except (OSError, pa.ArrowException) as exc:
        raise _unreadable(part, exc) from None


def _non_null(pf: pq.ParquetFile, column: str) -> np.ndarray:
    col = pf.schema_arrow.names.index(column)
    out = []
    for g in range(pf.metadata.num_row_groups):
        rg = pf.metadata.row_group(g)
        stats = rg.column(col).statistics
        nulls = stats.null_count if stats is not None and stats.has_null_count else None
        if nulls in (0, rg.num_rows):
            out.append(np.full(rg.num_rows, nulls == 0))
        else:
            out.append(pf.read_row_group(g, columns=[column]).column(0).is_valid().to_numpy(zero_copy_only=False))
    return np.concatenate(out) if out else np.zeros(0, dtype=bool)


def read_manifest(root: str | Path, table: str = lay.MANIFEST_DIR, splits=None, columns=None, *,
                  allow_incomplete: bool = False) -> pd.DataFrame:
    """Open a dataset folder and read one of its tables (a shortcut for scripts and tests)."""
    return read_rows(open_dataset(root, allow_incomplete=allow_incomplete), table, splits=splits, columns=columns)
