"""Safe file writing: everything lands under a temporary name and is renamed into place,
so an interrupted run never leaves a half-written file behind."""

from __future__ import annotations

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
