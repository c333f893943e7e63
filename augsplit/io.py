"""Safe file writing: everything lands under a temporary name and is renamed into place,
so an interrupted run never leaves a half-written file behind. Also: plain JSON values."""

from __future__ import annotations

import math
import os
from contextlib import contextmanager
from pathlib import Path


@contextmanager
def atomic_path(path: str | Path):
    """Yield a temporary path next to `path`; on success rename it over `path`."""
    p = Path(path)
    tmp = p.with_name(f".{p.name}.tmp-{os.getpid()}")
    try:
        yield tmp
        os.replace(tmp, p)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_bytes_atomic(path: str | Path, data: bytes) -> None:
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as f:
            f.write(data)


def write_text_atomic(path: str | Path, text: str) -> None:
    write_bytes_atomic(path, text.encode("utf-8"))


def plain(v):
    """Numbers, arrays, numpy scalars and containers -> JSON values (NaN, inf and NA -> None)."""
    import numpy as np
    import pandas as pd

    if isinstance(v, dict):
        return {str(k): plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [plain(x) for x in v]
    if isinstance(v, np.ndarray):
        return [plain(x) for x in v.tolist()]
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, (float, np.floating)):
        f = float(v)
        return f if math.isfinite(f) else None
    if v is None or isinstance(v, (int, str)):
        return v
    if v is pd.NA or v is pd.NaT:
        return None
    return str(v)
