"""The parameter log: what every online draw (sampler item or plugin call) actually used.

`ParamLog(log_dir)` buffers one row per draw and writes them as Parquet files
`<log_dir>/part-<pid>-<token>-<n>.parquet` (each written under a temporary name and renamed),
one series per process, so DataLoader workers never share a file. `read_log(log_dir)` (or
plain `pandas.read_parquet(log_dir)`) gives one table with the manifest's axis columns plus
`split`, `epoch`, `item`, `worker`, `pid`, `source` and `spec_hash`; the audit reads it.
The bbox columns hold what the draw covered on the canvas: the rendered object's footprint
box (sampler) or the box around the placed content (plugin), end exclusive, zeros if none.
"""

from __future__ import annotations

import json
import os
import secrets
import sys
import threading
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from . import manifest as mf
from .errors import DatasetError
from .formats.table import read_table
from .io import atomic_path

# Columns taken from the manifest schema (same names, types and units), then the log's own.
SHARED_COLUMNS = ("class_name", "class_index", "cell", *mf.AXIS_COLUMNS, "cx_px", "cy_px",
                  "bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1")
_MANIFEST_TYPES = {c.name: c.type for c in mf.IMAGE_COLUMNS}
LOG_ONLY: tuple[mf.Column, ...] = (
    mf.Column("split", pa.string(), "", "the split whose region the draw came from"),
    mf.Column("epoch", pa.int64(), "", "epoch the draw belongs to (set_epoch; 0 if never set)"),
    mf.Column("item", pa.int64(), "", "item index within the epoch (the per-process call count when the caller gives none)"),
    mf.Column("worker", pa.int16(), "", "torch DataLoader worker id, -1 outside a DataLoader worker"),
    mf.Column("pid", pa.int32(), "", "process id that made the draw"),
    mf.Column("source", pa.string(), "", "what drew it: OnlineSampler, RegionPlacement, HeldOutPlacement, RegionColour"),
    mf.Column("spec_hash", pa.string(), "", "hash of the spec whose region was drawn from"),
)
LOG_SCHEMA = pa.schema([pa.field(c.name, c.type) for c in LOG_ONLY[:2]]
                       + [pa.field(n, _MANIFEST_TYPES[n]) for n in SHARED_COLUMNS]
                       + [pa.field(c.name, c.type) for c in LOG_ONLY[2:]])
COLUMNS = tuple(LOG_SCHEMA.names)
_COLUMN_SET = frozenset(COLUMNS)
PART_GLOB = "part-*.parquet"


def current_worker() -> int:
    """The torch DataLoader worker id of this process, -1 outside one. Never imports torch:
    a process that has not imported it cannot be a DataLoader worker."""
    torch = sys.modules.get("torch")
    if torch is None:
        return -1
    info = torch.utils.data.get_worker_info()
    return -1 if info is None else int(info.id)


class ParamLog:
    """Append-only, multi-process-safe recorder of online draws (see the module docstring).

    Rows are buffered per process and written every `flush_every` rows, on `flush()`/`close()`,
    and when the process exits. A buffer inherited through fork is dropped in the child (the
    parent writes it), so no row is written twice.
    """

    def __init__(self, log_dir: str | Path, flush_every: int = 4096):
        if int(flush_every) < 1:
            raise DatasetError(f"flush_every must be a positive number of rows, got {flush_every}", where="ParamLog")
        self.log_dir = Path(log_dir)
        self.flush_every = int(flush_every)
        self._pid = None
        self._lock = threading.Lock()
        self._reset()

    def _reset(self) -> None:
        self._pid = os.getpid()
        self._buffer: dict[str, list] = {n: [] for n in COLUMNS}
        self._rows = 0
        self._token = secrets.token_hex(4)  # pids are reused across epochs; file names must not be
        self._n = 0
        self._meta: dict[bytes, bytes] | None = None
        self._hash: str | None = None
        self._exit_hook = False

    def _own(self) -> None:
        if os.getpid() != self._pid:
            self._reset()
        if not self._exit_hook:
            # multiprocessing runs these at exit in the main process and in its children
            # (DataLoader workers), where plain atexit handlers do not run
            from multiprocessing import util

            util.Finalize(self, ParamLog._flush_at_exit, args=(self,), exitpriority=10)
            self._exit_hook = True

    def __getstate__(self):
        # a log sent to a spawned worker arrives empty: buffers belong to the process that drew them
        return {"log_dir": self.log_dir, "flush_every": self.flush_every}

    def __setstate__(self, state):
        self.__init__(state["log_dir"], state["flush_every"])

    def record(self, plan, split: str, values: Mapping, *, epoch, item, source: str) -> None:
        """Buffer the draws in `values` (columns of equal length, or scalars for one draw).

        Keys not in the log schema are ignored; schema columns not given are left null
        (a transform that does not apply an axis leaves its column empty)."""
        given = {k: v for k, v in values.items() if k in _COLUMN_SET}
        scalar = all(np.ndim(v) == 0 for v in given.values()) and np.ndim(item) == 0 and np.ndim(epoch) == 0
        with self._lock:
            self._own()
            if self._hash is None:
                self._hash = plan.hash
                self._meta = mf.file_metadata(plan.settings.canonical, plan.hash)
            elif plan.hash != self._hash:
                raise DatasetError(f"this log already holds draws of spec {self._hash}; draws of spec {plan.hash} "
                                   "need a log folder of their own", where=str(self.log_dir))
            fixed = {"split": split, "epoch": epoch, "item": item, "worker": current_worker(), "pid": self._pid,
                     "source": source, "spec_hash": self._hash}
            if scalar:  # one draw: the common case, kept free of array work
                n = 1
                for name in COLUMNS:
                    v = given[name] if name in given else fixed.get(name)
                    self._buffer[name].append(v.item() if isinstance(v, np.generic) else v)
            else:
                cols = {k: np.atleast_1d(np.asarray(v)) for k, v in given.items()}
                n = max((len(v) for v in cols.values()), default=1)
                n = max(n, np.size(item), np.size(epoch))
                for name in COLUMNS:
                    v = cols.get(name)
                    if v is None and name in fixed:
                        v = np.atleast_1d(np.asarray(fixed[name]))
                    if v is None:
                        self._buffer[name].extend([None] * n)
                    else:
                        self._buffer[name].extend(np.broadcast_to(v, (n,)).tolist())
            self._rows += n
            if self._rows >= self.flush_every:
                self._write()

    def flush(self) -> None:
        """Write the buffered rows of this process (if any) as one new part file."""
        with self._lock:
            if os.getpid() == self._pid and self._rows:
                self._write()

    close = flush

    def _flush_at_exit(self) -> None:
        try:
            self.flush()
        except DatasetError as exc:  # nobody is left to catch it: say so in one line
            print(f"augsplit: parameter log rows of process {os.getpid()} were not written: {exc}", file=sys.stderr)

    def __enter__(self) -> "ParamLog":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _write(self) -> None:
        table = mf.to_table(self._buffer, LOG_SCHEMA, self._meta or {})
        path = self.log_dir / f"part-{self._pid}-{self._token}-{self._n:06d}.parquet"
        if self.log_dir.exists() and not self.log_dir.is_dir():
            raise DatasetError("the parameter log folder is a file", where=str(self.log_dir))
        try:
            self.log_dir.mkdir(parents=True, exist_ok=True)
            with atomic_path(path) as tmp:
                pq.write_table(table, tmp, compression="zstd", row_group_size=max(1, table.num_rows))
        except OSError as exc:
            raise DatasetError(f"cannot write the parameter log: {exc.strerror or exc}", where=str(path)) from None
        self._n += 1
        self._buffer = {n: [] for n in COLUMNS}
        self._rows = 0

    def __repr__(self) -> str:
        return f"ParamLog({str(self.log_dir)!r}, flush_every={self.flush_every})"


def log_files(log_dir: str | Path) -> list[Path]:
    return sorted(Path(log_dir).glob(PART_GLOB))


def read_log(log_dir: str | Path) -> pd.DataFrame:
    """Every row of a parameter log as one DataFrame, ordered by epoch, item, worker, pid."""
    log_dir = Path(log_dir)
    if not log_dir.is_dir():
        raise DatasetError("no such parameter log folder", where=str(log_dir))
    if not log_files(log_dir):
        return LOG_SCHEMA.empty_table().to_pandas()
    df = read_table(log_dir, what="parameter log part")
    return df.sort_values(["epoch", "item", "worker", "pid"], kind="stable").reset_index(drop=True)


def log_spec(log_dir: str | Path) -> dict | None:
    """The spec (as a dict) the log's draws came from, from the first part's metadata."""
    files = log_files(log_dir)
    if not files:
        return None
    from .dataset.boxfs import open_part
    from .formats.boxes import dataset_box

    # through a box of the log folder, as read_table reads the rows: a part linked out is refused
    with open_part(dataset_box(log_dir, "folder given").naming("parameter log part"), files[0]) as f:
        md = pq.read_schema(f).metadata or {}
    return json.loads(md[mf.META_SPEC]) if mf.META_SPEC in md else None
