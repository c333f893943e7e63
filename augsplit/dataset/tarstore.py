"""`--store tar`: one POSIX ustar archive per shard, `shards/split=<name>/part-NNNNNN.tar`,
holding for each image, in image order, `<image_id>.<ext>` (the encoded image) then
`<image_id>.json` (its manifest row as plain JSON), so streaming loaders read it in one pass.

Headers are fixed (mtime 0, uid/gid 0, empty owner names, mode 0644), so a shard's bytes
depend on its images alone, whatever worker or executor wrote it. A row finds its image
through its `tar_file` and `tar_offset` (the member header's offset) columns; every read goes
through the dataset folder's closed box, and member sizes are bounded before reading.
"""

from __future__ import annotations

import json
import math
import os
import tarfile

import numpy as np
import pyarrow as pa

from .. import manifest as mf
from ..errors import DatasetError
from .images import FORMATS, ImageError, max_bytes, row_where

BLOCK = tarfile.BLOCKSIZE  # 512: the ustar header and data block size (POSIX.1-1988 ustar)
JSON_MAX_BYTES = 1 << 20
# every column of a row except the embedded bytes, plus the split it belongs to
JSON_COLUMNS = tuple(c.name for c in mf.IMAGE_COLUMNS if c.name != "image_bytes")


def plain(v):
    """A row value as plain JSON: numpy scalars to Python, NaN and missing values to null."""
    if isinstance(v, np.generic):
        v = v.item()
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return None
    if isinstance(v, (bytes, bytearray)):
        raise DatasetError("a manifest row holds bytes where JSON needs text")
    return v


def row_record(row) -> dict:
    """The JSON record of a manifest row (a dict, a pandas Series or a `to_pylist` item)."""
    return {k: plain(row.get(k)) for k in JSON_COLUMNS}


def header(name: str, size: int) -> bytes:
    """The 512-byte ustar header of a regular file with the fixed owner, mode and time, laid
    out as POSIX.1-1988 ustar says (the bytes equal those Python's tarfile writes for the same
    member; a test compares them). Built by hand: tarfile's TarInfo costs ~100 us a member."""
    raw = name.encode("utf-8")
    if len(raw) > 100 or not raw:
        raise DatasetError(f"cannot store {name!r} in a ustar archive: a member name holds 1 to 100 bytes")
    size_field = b"%011o\0" % size
    # the sum of the header's bytes with the checksum field as eight spaces, as ustar defines
    # it: the fixed fields' share is summed once (a sum over 512 bytes per member cost ~5 us)
    chksum = _FIXED_SUM + sum(raw) + sum(size_field)
    return b"".join((raw.ljust(100, b"\0"), _FIXED_MODE_IDS, size_field, _MTIME, b"%06o\0 " % chksum, _FIXED_REST_2))


# mode 0644, uid 0, gid 0 (each 7 octal digits and NUL); then mtime 0, the checksum's place,
# type '0', an empty link name, magic "ustar\0" version "00", empty owner names, empty device
# numbers (a regular file has none) and an empty prefix
_FIXED_MODE_IDS = b"0000644\0" + b"0000000\0" * 2
_MTIME = b"%011o\0" % 0
_FIXED_REST_2 = b"0" + b"\0" * 100 + b"ustar\x0000" + b"\0" * (64 + 16 + 167)  # after the checksum field
_FIXED_SUM = sum(_FIXED_MODE_IDS) + sum(_MTIME) + sum(b" " * 8) + sum(_FIXED_REST_2)


class TarShardWriter:
    """Appends (image, JSON row) member pairs to an open binary file in image order; `close`
    ends the archive as tarfile does (two zero blocks, padded to a 10240-byte record)."""

    def __init__(self, fileobj):
        self._f = fileobj
        self.offset = 0

    def _member(self, name: str, payload: bytes) -> None:
        pad = -len(payload) % BLOCK
        self._f.write(header(name, len(payload)))
        self._f.write(payload)
        if pad:
            self._f.write(b"\0" * pad)
        self.offset += BLOCK + len(payload) + pad

    def add(self, image_id: str, suffix: str, data: bytes, record: dict) -> int:
        """Add one image and its row (a dict of plain values, whose `tar_offset` is set here);
        return that offset."""
        offset = self.offset
        record["tar_offset"] = offset
        self._member(image_id + suffix, data)
        self._member(image_id + ".json", _ENCODER.encode(record).encode())
        return offset

    def close(self) -> None:
        end = self.offset + 2 * BLOCK
        self._f.write(b"\0" * (2 * BLOCK + -end % tarfile.RECORDSIZE))


_ENCODER = json.JSONEncoder(separators=(",", ":"), allow_nan=False)


def json_values(column) -> list:
    """A pyarrow column's values as its JSON records hold them: its `to_pylist`, NaN as null."""
    values = column.to_pylist()
    if pa.types.is_floating(column.type):
        return [None if v != v else v for v in values]
    return values


# ---- reading ----------------------------------------------------------------------------------


def _open_in_box(folder, rel: str, where: str):
    """A tar file inside the dataset folder, open, checked as the closed box checks a file
    before and after it is opened (a regular file, inside the folder)."""
    return folder.box.naming("shard archive").open(rel, None, where)


def _member_ok(ti: tarfile.TarInfo, image_id: str, limit: int, rel: str, where: str) -> None:
    stem, dot, ext = ti.name.rpartition(".")
    if stem != image_id or f".{ext}" not in FORMATS.values() or not ti.isreg():
        raise ImageError(f"shard archive {rel} holds {ti.name!r} where the row's image should be", where=where)
    if ti.size > limit:
        raise ImageError(f"member {ti.name} of {rel} has {ti.size} bytes, more than any image of this canvas",
                         where=where)


def read_member(folder, row) -> bytes:
    """The encoded image of a tar-store row, read at its recorded offset (one header, one member)."""
    where = row_where(row)
    rel, offset = row.get("tar_file"), plain(row.get("tar_offset"))
    if not isinstance(offset, int) or offset < 0 or offset % BLOCK:
        raise ImageError(f"the row's tar_offset {offset!r} is not a header position", where=where)
    limit = max_bytes(folder.hw, folder.channels)
    with _open_in_box(folder, rel, where) as f:
        if offset + BLOCK > os.fstat(f.fileno()).st_size:  # beyond it a seek can fail (EINVAL) or read nothing
            raise ImageError(f"the row's tar_offset {offset} lies past the end of {rel}", where=where)
        f.seek(offset)
        head = f.read(BLOCK)
        try:
            ti = tarfile.TarInfo.frombuf(head, tarfile.ENCODING, "surrogateescape")
        except tarfile.HeaderError as exc:
            raise ImageError(f"no ustar header at byte {offset} of {rel}: {exc}", where=where) from None
        _member_ok(ti, str(row.get("image_id")), limit, rel, where)
        data = f.read(ti.size)
    if len(data) != ti.size:
        raise ImageError(f"shard archive {rel} ends inside member {ti.name}", where=where)
    return data


def iter_members(folder, rel: str, where: str, limit: int):
    """(TarInfo, bytes) of every member of a shard archive, in order, each size-bounded before it
    is read; a damaged archive ends the iteration with an ImageError."""
    with _open_in_box(folder, rel, where) as f:
        try:
            tar = tarfile.open(fileobj=f, mode="r|")
            for ti in tar:
                if not ti.isreg() or ti.size > limit:
                    yield ti, None
                else:
                    got = tar.extractfile(ti).read()
                    yield ti, got
                tar.members = []  # streamed: keep no list of what was read
        except (tarfile.TarError, OSError, EOFError) as exc:
            raise ImageError(f"shard archive {rel} is damaged: {exc}", where=where) from None
