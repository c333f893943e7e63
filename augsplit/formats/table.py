"""Foreign tables in, one way for every command (assign, audit, score's predictions, the
parameter log): a CSV or TSV file, a Parquet file, or a folder of Parquet files with hive
partition folders (`key=value`, read as text columns). Whatever reads a table gets the same
columns; every problem is one DatasetError naming the file."""

from __future__ import annotations

import csv
import io
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import pandas as pd

from ..dataset.boxfs import filesystem, open_part
from ..errors import DatasetError
from .boxes import dataset_box

PARQUET_SUFFIXES = (".parquet", ".pq")
TEXT_SUFFIXES = {".csv": None, ".txt": None, ".tsv": "\t", ".tab": "\t"}  # None: sniffed
DELIMITERS = (",", "\t", ";", "|")  # sniffing prefers the earlier one on a tie
PARQUET_MAGIC = b"PAR1"
# pandas.read_csv's default NA strings (pandas documentation, read_csv `na_values`); used
# to keep them for every column but the ones a caller wants verbatim as text
NA_STRINGS = ("", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND", "1.#QNAN", "<NA>",
              "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null")
_HEADER_LIMIT = 1 << 20  # bytes of the first line looked at to find the delimiter


@dataclass(frozen=True)
class Table:
    """An opened table file or folder: its columns known, its rows read on demand.

    `kind` is "csv" (also TSV; `sep` says which) or "parquet". `text` names CSV columns read
    verbatim as strings (no number parsing, no NA strings)."""

    path: Path
    kind: str
    columns: tuple[str, ...]
    sep: str | None = None
    text: tuple[str, ...] = ()
    what: str = "table"
    dataset: object = field(default=None, repr=False, compare=False)  # pyarrow.dataset.Dataset
    trailing: bool = False  # CSV rows end in a field separator (a trailing comma), every extra field empty

    def read(self, columns=None) -> pd.DataFrame:
        """The named columns (those the table has; all when None) of every row."""
        parts = list(self.iter_batches(columns, batch_rows=1 << 20))
        cols = self._present(columns)
        if not parts:
            return pd.DataFrame({c: [] for c in cols})
        return pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0]

    def iter_batches(self, columns=None, batch_rows: int = 1 << 14) -> Iterator[pd.DataFrame]:
        """The named columns in row order, at most `batch_rows` rows at a time (flat memory:
        Parquet is read one row group at a time, CSV in chunks)."""
        cols = self._present(columns)
        if self.kind == "csv":
            yield from self._csv_batches(cols, batch_rows)
        else:
            yield from self._parquet_batches(cols, batch_rows)

    def _present(self, columns) -> list[str]:
        if columns is None:
            return list(self.columns)
        have = set(self.columns)
        return [c for c in dict.fromkeys(columns) if c in have]

    def _csv_batches(self, cols: list[str], batch_rows: int) -> Iterator[pd.DataFrame]:
        # every column is parsed, whichever are kept: a ragged row is an error for every reader
        try:
            chunks = pd.read_csv(self.path, chunksize=batch_rows, **_csv_options(self))
            while True:
                with _ragged_rows_refused(self.trailing):  # while parsing only, never across the yield
                    chunk = next(chunks, None)
                if chunk is None:
                    break
                yield chunk[cols].reset_index(drop=True)
        except DatasetError:
            raise
        except (ValueError, OSError, UnicodeDecodeError, pd.errors.ParserWarning) as exc:  # parser errors are ValueErrors
            raise _unreadable(self.path, self.what, exc) from None

    def _parquet_batches(self, cols: list[str], batch_rows: int) -> Iterator[pd.DataFrame]:
        for fragment in self.dataset.get_fragments():
            # One row group at a time, released before the next: reading a whole file (or
            # ParquetFile.iter_batches) keeps every row group alive, a whole file of images.
            try:
                groups = fragment.split_by_row_group()
            except (OSError, ValueError) as exc:
                raise _unreadable(Path(fragment.path), self.what, exc) from None
            for group in groups:
                try:
                    t = group.to_table(schema=self.dataset.schema, columns=cols, use_threads=False)
                except (OSError, ValueError) as exc:
                    raise _unreadable(Path(fragment.path), self.what, exc) from None
                for rb in t.to_batches(max_chunksize=batch_rows):
                    yield rb.to_pandas()
                del t


def read_table(path, columns=None, *, text=(), what: str = "table") -> pd.DataFrame:
    """A CSV/TSV file, Parquet file or folder of Parquet files as one DataFrame.

    `columns`: the ones wanted (those the table lacks are left out; None for all). `text`:
    CSV columns kept verbatim as strings. `what` names the table in error messages.
    Raises DatasetError (one line, naming the file) when it is missing, unreadable, of an
    unknown type, a folder without Parquet files, or has no rows."""
    return open_table_file(path, text=text, what=what).read(columns)


def open_table_file(path, *, text=(), what: str = "table") -> Table:
    """Open a table (see `read_table`) without reading its rows: columns and kind known."""
    p = Path(path)
    if not p.exists():
        raise DatasetError("no such file or folder", where=str(p))
    if p.is_dir():
        return _open_parquet(p, _parquet_files(p), what)
    if not p.is_file():
        raise DatasetError(f"the {what} is neither a regular file nor a folder", where=str(p))
    suffix = p.suffix.lower()
    if suffix in PARQUET_SUFFIXES:
        return _open_parquet(p, [p], what)
    try:
        with open(p, "rb") as f:
            head = f.readline(_HEADER_LIMIT)
    except OSError as exc:
        raise _unreadable(p, what, exc) from None
    if not head:
        raise DatasetError(f"the {what} is empty", where=str(p))
    if head.startswith(PARQUET_MAGIC):
        return _open_parquet(p, [p], what)
    if suffix not in TEXT_SUFFIXES:
        raise DatasetError(f"unknown file type {suffix or '(none)'}; use .csv, .tsv, .parquet or a folder of "
                           "Parquet files", where=str(p))
    return _open_csv(p, TEXT_SUFFIXES[suffix] or _sniff(head, p, what), tuple(text), what)


def _sniff(head: bytes, p: Path, what: str) -> str:
    """The delimiter that splits the header line into the most fields (comma on a tie)."""
    try:
        line = head.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise _unreadable(p, what, exc) from None
    counts = [len(next(csv.reader(io.StringIO(line), delimiter=d), [])) for d in DELIMITERS]
    return DELIMITERS[counts.index(max(counts))]


@contextmanager
def _ragged_rows_refused(trailing: bool = False):
    """pandas keeps the header's columns of a row with more values (index_col=False) and only
    warns that the rest is lost: here that is an error, unless the table's rows end in a
    trailing separator whose fields were all seen to be empty (`trailing`, `_trailing_separator`)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore" if trailing else "error", pd.errors.ParserWarning)
        yield


def _trailing_separator(p: Path, sep: str, ncols: int) -> bool:
    """Whether the rows end in a separator the header lacks (a trailing comma): the first data
    row has more fields than the header's `ncols`, and every such row has only empty ones
    beyond them. The whole file is read (the csv module) only when the first row is longer."""
    try:
        with open(p, newline="", encoding="utf-8-sig") as f:
            rows = csv.reader(f, delimiter=sep)
            next(rows, None)  # the header
            first = next(rows, None)
            if first is None or len(first) <= ncols:
                return False
            return not any(len(row) > ncols and any(v.strip() for v in row[ncols:]) for row in (first, *rows))
    except (OSError, UnicodeDecodeError, csv.Error):
        return False


def _csv_options(t: Table) -> dict:
    # index_col=False: a trailing comma on every row does not turn the first column into the index
    opts: dict = {"sep": t.sep, "encoding": "utf-8-sig", "index_col": False}
    text = [c for c in t.text if c in t.columns]
    if text:
        opts.update(dtype={c: str for c in text}, keep_default_na=False,
                    na_values={c: list(NA_STRINGS) for c in t.columns if c not in text})
    return opts


def _open_csv(p: Path, sep: str, text: tuple[str, ...], what: str) -> Table:
    probe = Table(p, "csv", (), sep, (), what)
    try:
        with _ragged_rows_refused():
            first = pd.read_csv(p, nrows=1, **_csv_options(probe))
    except pd.errors.EmptyDataError:
        raise DatasetError(f"the {what} is empty", where=str(p)) from None
    except (ValueError, OSError, UnicodeDecodeError, pd.errors.ParserWarning) as exc:
        raise _unreadable(p, what, exc) from None
    if first.empty:
        raise DatasetError(f"the {what} has no rows", where=str(p))
    columns = tuple(str(c) for c in first.columns)
    return Table(p, "csv", columns, sep, text, what, trailing=_trailing_separator(p, sep, len(columns)))


def _parquet_files(folder: Path) -> list[Path]:
    """Every Parquet file under `folder` in path order, skipping hidden or `_` names (temporary
    and metadata files) anywhere below it."""
    files = []
    for f in folder.rglob("*"):
        rel = f.relative_to(folder).parts
        if f.suffix.lower() in PARQUET_SUFFIXES and f.is_file() and not any(s[:1] in "._" for s in rel):
            files.append(f)
    if not files:
        raise DatasetError("the folder holds no Parquet files (a folder is read as the parts of one table)",
                           where=str(folder))
    return sorted(files)


def _open_parquet(root: Path, files: list[Path], what: str) -> Table:
    import pyarrow as pa
    import pyarrow.dataset as ds
    import pyarrow.parquet as pq

    base = root if root.is_dir() else root.parent
    # the files of a folder are read through a closed box of it (dataset/boxfs.py): one linked
    # out of the folder is refused, not read; a file given by its own path is read as named
    box = dataset_box(root, "folder given").naming(what) if root.is_dir() else None
    schema = None
    keys: dict[str, None] = {}
    rows = 0
    for f in files:
        try:
            if box is None:
                meta = pq.read_metadata(f)
            else:
                with open_part(box, f) as source:
                    meta = pq.read_metadata(source)
            s = meta.schema.to_arrow_schema()
            schema = s if schema is None else pa.unify_schemas([schema, s])
        except (OSError, ValueError, pa.ArrowException) as exc:
            raise _unreadable(f, what, exc) from None
        rows += meta.num_rows
        if root.is_dir():
            keys.update((part.split("=", 1)[0], None) for part in f.relative_to(root).parts[:-1] if "=" in part)
    if rows == 0:
        raise DatasetError(f"the {what} has no rows", where=str(root))
    # a hive key that is also a column of the files: the files' values win
    part_fields = [pa.field(k, pa.string()) for k in keys if k not in schema.names]
    full = pa.schema(list(schema) + part_fields)
    partitioning = ds.partitioning(pa.schema(part_fields), flavor="hive") if part_fields else None
    dataset = ds.dataset([str(f) for f in files], schema=full, format="parquet", partitioning=partitioning,
                         partition_base_dir=str(base), filesystem=None if box is None else filesystem(box))
    return Table(root, "parquet", tuple(full.names), None, (), what, dataset)


def _unreadable(p: Path, what: str, exc: BaseException) -> DatasetError:
    if isinstance(exc, pd.errors.ParserWarning):
        return DatasetError(f"unreadable {what}: a row has more values than the header line has columns",
                            where=str(p))
    lines = str(exc).strip().splitlines()
    return DatasetError(f"unreadable {what}: {lines[0] if lines else type(exc).__name__}", where=str(p))


# ---- writing ------------------------------------------------------------------------------

OUTPUT_SEPARATORS = {".csv": ",", ".tsv": "\t", ".tab": "\t"}


def output_kind(path) -> str:
    """"parquet", "csv" or "tsv" from the output path's extension (`-` is CSV on stdout);
    any other extension is refused in one line."""
    from ..io import is_stdout

    if is_stdout(path):
        return "csv"
    suffix = Path(path).suffix.lower()
    if suffix in PARQUET_SUFFIXES:
        return "parquet"
    if suffix in OUTPUT_SEPARATORS:
        return "tsv" if OUTPUT_SEPARATORS[suffix] == "\t" else "csv"
    raise DatasetError(f"cannot write a table as {suffix or '(no extension)'}; use .csv, .tsv or .parquet",
                       where=str(path))


def write_table(df: pd.DataFrame, path) -> None:
    """`df` as Parquet, CSV or TSV by the extension of `path`, written safely (see augsplit.io);
    `-` writes CSV to standard output."""
    from ..io import is_stdout, output_path, write_output

    kind = output_kind(path)
    if is_stdout(path):
        write_output(path, df.to_csv(index=False))
        return
    with output_path(path) as tmp:
        if kind == "parquet":
            df.to_parquet(tmp, index=False)
        else:
            df.to_csv(tmp, index=False, sep="\t" if kind == "tsv" else ",")
