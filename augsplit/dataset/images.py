"""The image of a manifest row, in one place: its file, its embedded bytes, or a re-render
from the row alone; and the codecs that encode and decode stored images.

The dataset is a closed box: a `file` path from a manifest is resolved inside the dataset
folder (no `..`, no absolute path, no symbolic link out), must name a regular file (never a
FIFO, device or folder), and is read with a size limit derived from the canvas. Any violation,
and any image that does not decode to the canvas, is an ImageError naming split and image id:
verify and audit report it as a finding, loaders raise it.
"""

from __future__ import annotations

import copy
import hashlib
import os
import stat
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

import cv2
import numpy as np

from ..errors import DatasetError
from .png import SIGNATURE as PNG_SIGNATURE
from .png import DEFLATE, encode_png

FORMATS = {"png": ".png", "jpeg": ".jpg", "webp": ".webp"}


class ImageError(DatasetError):
    """The stored image of one row cannot be had; `where` names the split and image id."""


def row_where(row) -> str:
    return f"split {row.get('split', '?')}, image {row.get('image_id', '?')}"


# ---- codecs -------------------------------------------------------------------------------


def encode(image: np.ndarray, fmt: str, quality: int, png_level: int | None = None,
           png_deflate: str = DEFLATE) -> bytes:
    """RGB or grey (H, W, C) pixels -> the bytes of a file of `fmt`: PNG by the package's own
    writer (dataset/png.py: "up" row filter, then `png_deflate` at `png_level`, None for that
    library's default), JPEG and WebP by OpenCV."""
    if fmt == "png":
        return encode_png(image, png_level, png_deflate)
    img = image[..., 0] if image.shape[2] == 1 else cv2.cvtColor(image, cv2.COLOR_RGB2BGR)
    params = {"jpeg": [cv2.IMWRITE_JPEG_QUALITY, quality], "webp": [cv2.IMWRITE_WEBP_QUALITY, quality]}[fmt]
    ok, buf = cv2.imencode(FORMATS[fmt], img, params)
    if not ok:
        raise DatasetError(f"OpenCV could not encode a {fmt} image")
    return buf.tobytes()


def decode(data: bytes, channels: int, where: str | None = None, hw: tuple[int, int] | None = None) -> np.ndarray:
    """Encoded bytes -> (H, W, C) uint8, RGB or grey (C = 1); with `hw`, the size is checked
    (before decoding, for PNG, so a small file cannot claim a huge picture)."""
    if not data:  # OpenCV asserts on an empty buffer
        raise ImageError("the stored image is empty (0 bytes)", where=where)
    if hw is not None:
        _check_png_size(data, hw, where)
    img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_GRAYSCALE if channels == 1 else cv2.IMREAD_COLOR)
    if img is None:
        raise ImageError("the stored image cannot be decoded (corrupt or not an image)", where=where)
    if hw is not None and img.shape[:2] != tuple(hw):
        raise ImageError(f"the stored image is {img.shape[1]}x{img.shape[0]}, the canvas {hw[1]}x{hw[0]}", where=where)
    return img[..., None] if channels == 1 else cv2.cvtColor(img, cv2.COLOR_BGR2RGB)


def decode_any(data: bytes, where: str | None = None) -> np.ndarray:
    """Encoded bytes of any image (PNG, JPEG, WebP ...) -> RGB(A) or grey uint8, as stored."""
    img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_UNCHANGED)
    if img is None:
        raise ImageError("cannot decode the image", where=where)
    return to_rgb(img)


def to_rgb(img: np.ndarray) -> np.ndarray:
    """OpenCV's BGR(A) (any depth) -> RGB(A) uint8; grey stays grey."""
    if img.dtype != np.uint8:
        img = (img / 257).astype(np.uint8) if img.dtype == np.uint16 else img.astype(np.uint8)
    if img.ndim == 3 and img.shape[2] == 3:
        return cv2.cvtColor(img, cv2.COLOR_BGR2RGB)
    if img.ndim == 3 and img.shape[2] == 4:
        return cv2.cvtColor(img, cv2.COLOR_BGRA2RGBA)
    return img


def _check_png_size(data: bytes, hw: tuple[int, int], where) -> None:
    # PNG spec, section 11.2.2: IHDR is the first chunk; width and height are big-endian at 16..24
    if data[:8] == PNG_SIGNATURE and len(data) >= 24 and data[12:16] == b"IHDR":
        w, h = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
        if (h, w) != tuple(hw):
            raise ImageError(f"the stored image is {w}x{h}, the canvas {hw[1]}x{hw[0]}", where=where)


# the most bytes read for one image a foreign table names (no canvas to derive a bound from)
FOREIGN_MAX_BYTES = 256 << 20


def max_bytes(hw: tuple[int, int], channels: int) -> int:
    """The most bytes a stored image of this canvas may take: twice the raw pixels plus 1 MiB.
    Generous (PNG never grows much beyond the raw size; JPEG and WebP stay below it), finite."""
    return 2 * int(hw[0]) * int(hw[1]) * int(channels) + (1 << 20)


# ---- the closed box -----------------------------------------------------------------------


class Box:
    """A folder as a closed box for the relative paths a table names (see the module
    docstring). Each folder on the way is resolved once per box; the file itself is checked
    with lstat before it is opened (no symbolic link, FIFO or device is ever opened through
    it) and, once open, again: fstat says it is a regular file, and the name the kernel gives
    the open file (`opened_path`) must lie inside the box, so a folder on the way swapped for
    a link out between the check and the open is caught rather than read through.

    `what` names the files in messages ("image" for a dataset's images; "label", "XML" ...).
    `literal`: the paths are names found in the folder (by listing it, or resolved in it
    already), not read from a table, so a name may begin with `~` or hold a backslash; a table's
    path may not, as other tools would read it as a home folder or a Windows separator."""

    def __init__(self, root: str | Path, what: str = "image", literal: bool = False, place: str = "dataset folder"):
        self.root = str(root)
        self.place = place  # what the folder is, in messages
        self.base = os.path.realpath(root)
        self.what = what
        self.literal = literal
        self._dirs: set[str] = set()

    def naming(self, what: str) -> "Box":
        """The same box (its checked folders shared) naming its files `what` in messages."""
        other = copy.copy(self)
        other.what = what
        return other

    def _lexical(self, rel, where) -> PurePosixPath:
        if not isinstance(rel, str) or not rel:
            raise ImageError(f"the row names no {self.what} file", where=where)
        p = PurePosixPath(rel)
        foreign = not self.literal and (rel.startswith("~") or "\\" in rel)
        if p.is_absolute() or foreign or ".." in p.parts or "\x00" in rel:
            raise ImageError(f"{self.what} path {rel!r} leaves the {self.place}; it was not read", where=where)
        return p

    def _inside(self, real: str) -> bool:
        return real == self.base or real.startswith(self.base.rstrip(os.sep) + os.sep)

    def _out(self, rel, where) -> ImageError:
        return ImageError(f"{self.what} path {rel!r} is a symbolic link out of the {self.place}; it was not read",
                          where=where)

    def resolve(self, rel, where: str | None = None) -> Path:
        """The real path of the regular file `rel` names inside the box, every link resolved."""
        self._lexical(rel, where)
        real = os.path.realpath(os.path.join(self.base, rel))
        if not self._inside(real):
            raise self._out(rel, where)
        self._check_mode(self._stat(os.stat, real, rel, where), rel, where)
        return Path(real)

    def _stat(self, how, path: str, rel: str, where):
        try:
            return how(path)
        except FileNotFoundError:
            if os.path.islink(os.path.join(self.base, rel)):  # resolve's stat of where a link leads
                raise ImageError(f"{self.what} path {rel!r} is a link to nothing (or a loop of links)",
                                 where=where) from None
            raise ImageError(f"{self.what} file {os.path.join(self.root, rel)} is missing", where=where) from None
        except OSError as exc:
            raise ImageError(f"{self.what} file {os.path.join(self.root, rel)} cannot be read: {exc.strerror}",
                             where=where) from None

    def _check_mode(self, st, rel, where, limit: int | None = None) -> None:
        if not stat.S_ISREG(st.st_mode):
            raise ImageError(f"{self.what} path {rel!r} is not a regular file; it was not read", where=where)
        if limit is not None and st.st_size > limit:
            raise ImageError(f"{self.what} file {rel} has {st.st_size} bytes, more than the {limit} allowed for "
                             "one; it was not read", where=where)

    def open_file(self, rel, limit: int | None = None, where: str | None = None):
        """The regular file `rel` inside the box, open for binary reading and checked as open
        (see the class), refused above `limit` bytes (None: no bound); reading no more than
        that from it, and closing it, is the caller's part (`open` closes it)."""
        p = self._lexical(rel, where)
        folder = str(p.parent)
        if folder not in self._dirs:
            real = os.path.realpath(os.path.join(self.base, folder))
            if not self._inside(real):
                raise self._out(rel, where)
            if os.path.isdir(real):  # a folder not there yet is checked next time
                self._dirs.add(folder)
        path = os.path.join(self.base, rel)
        st = self._stat(os.lstat, path, rel, where)
        if stat.S_ISLNK(st.st_mode):
            path = str(self.resolve(rel, where))  # a link that stays inside is followed
            st = self._stat(os.lstat, path, rel, where)
        self._check_mode(st, rel, where, limit)
        try:
            # O_NONBLOCK: were the file swapped for a FIFO since the check, open must not wait
            fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
        except OSError as exc:
            raise ImageError(f"{self.what} file {rel} cannot be opened: {exc.strerror}", where=where) from None
        f = os.fdopen(fd, "rb")
        try:
            self._check_mode(os.fstat(fd), rel, where, limit)
            real = opened_path(fd, path)
            if real is None or not self._inside(real):
                raise ImageError(f"{self.what} file {rel} was moved, or a folder on its way linked, out of the "
                                 f"{self.place} while it was opened; it was not read", where=where)
        except BaseException:
            f.close()
            raise
        return f

    @contextmanager
    def open(self, rel, limit: int | None, where: str | None = None):
        """`open_file` as a context: the file is closed on leaving."""
        with self.open_file(rel, limit, where) as f:
            yield f

    def read(self, rel, limit: int, where: str | None = None) -> bytes:
        """The bytes of the regular file `rel` inside the box, at most `limit` of them."""
        with self.open(rel, limit, where) as f:
            data = f.read(limit + 1)
        if len(data) > limit:
            raise ImageError(f"{self.what} file {rel} grew beyond {limit} bytes while read", where=where)
        return data


def opened_path(fd: int, path: str) -> str | None:
    """The real path of the file open at `fd`, as the kernel names it (Linux: /proc/self/fd,
    which names the file opened, whatever happened to the names on its way since); elsewhere
    `path` resolved, if that is still the same file (device and inode), else None."""
    try:
        real = os.readlink(f"/proc/self/fd/{fd}")
        if real.startswith("/"):  # a file's path; not "pipe:[...]" or "anon_inode:..."
            return real  # a file removed since it was opened reads "<its path> (deleted)", judged by that path
    except OSError:
        pass
    real = os.path.realpath(path)
    try:
        st, opened = os.stat(real), os.fstat(fd)
    except OSError:
        return None
    return real if (st.st_dev, st.st_ino) == (opened.st_dev, opened.st_ino) else None


def resolve_inside(root: Path, rel, where: str | None = None) -> Path:
    """The real path of the regular file `rel` names inside `root` (see Box), or ImageError."""
    return Box(root).resolve(rel, where)


# ---- the image of a row ---------------------------------------------------------------------


@dataclass(frozen=True)
class RowImage:
    image: np.ndarray  # (H, W, C) uint8
    placed: object | None  # the target's Placed when re-rendered, else None
    lossless: bool  # PNG, or re-rendered: pixels must equal the row's sha256


def _embedded(row):
    data = row.get("image_bytes") if hasattr(row, "get") else None
    return bytes(data) if isinstance(data, (bytes, bytearray, memoryview)) else None


def check_identity(row) -> None:
    """Every reader holds a row to its identity, as verify does: ImageError naming the row if
    its image_id is not its split and index."""
    if not own_id(row):
        raise ImageError(f"the row's image_id {row.get('image_id')!r} is not its split and index "
                         f"({row.get('split')!r}, {row.get('index')!r})", where=row_where(row))


def own_id(row) -> bool:
    """Whether the row's image_id is `<split>-<index:07d>`, as generate names its images."""
    split, index = row.get("split"), row.get("index")
    if not isinstance(split, str) or isinstance(index, (bool, np.bool_)):
        return False
    try:
        return row.get("image_id") == f"{split}-{int(index):07d}" and int(index) == index
    except (TypeError, ValueError, OverflowError):
        return False


def own_file(row, rel: str) -> bool:
    """Whether `rel` is where generate puts the row's image: images/<split>/<image_id>.<ext>."""
    from . import layout as lay

    split, iid, suffix = row.get("split"), row.get("image_id"), os.path.splitext(rel)[1]
    if suffix not in FORMATS.values() or not isinstance(split, str) or not isinstance(iid, str):
        return False
    try:
        return rel == lay.image_relpath(split, iid, suffix)
    except DatasetError:  # a split or id that cannot be a name in the folder
        return False


def stored_bytes(folder, row, data: bytes | None = None) -> bytes | None:
    """The encoded image a row stores (its file, its shard archive's member, else its embedded
    bytes), None when it stores none (`--store none`). ImageError when the file breaks the closed box or is too large."""
    where = row_where(row)
    limit = max_bytes(folder.hw, folder.channels)
    rel = row.get("file")
    if isinstance(rel, str) and rel:
        if not own_file(row, rel):  # every reader holds a row to its own file, as verify does
            raise ImageError(f"the row names {rel!r}, not its own image file", where=where)
        return folder.box.read(rel, limit, where)
    tar = row.get("tar_file")
    if isinstance(tar, str) and tar:
        from .tarstore import read_member  # --store tar: the member at the row's offset

        return read_member(folder, row)
    data = data if data is not None else _embedded(row)
    if data is not None and len(data) > limit:
        raise ImageError(f"embedded image of {len(data)} bytes, more than any image of this canvas", where=where)
    return data


def sha256_hex(data: bytes) -> str:
    """The checksum of stored image bytes (a row's file_sha256)."""
    return hashlib.sha256(data).hexdigest()


def checked_bytes(folder, row, data: bytes | None = None) -> bytes | None:
    """`stored_bytes`, held to the row's recorded checksum of them (file_sha256) where it has
    one: ImageError naming the row when they differ, so a reader that shows or copies a
    stored image never passes on one changed since it was written."""
    data = stored_bytes(folder, row, data)
    recorded = row.get("file_sha256")
    if data is not None and isinstance(recorded, str) and recorded and sha256_hex(data) != recorded:
        raise ImageError("the stored image does not match its checksum (file_sha256); 'augsplit verify' "
                         "lists every such row", where=row_where(row))
    return data


def load(folder, row, *, data: bytes | None = None, checked: bool = False) -> RowImage:
    """The image of a row: stored (file or bytes, decoded and size-checked) or re-rendered.
    `data` passes embedded bytes a caller has already read; `checked`: stored bytes are held
    to their recorded checksum (see `checked_bytes`)."""
    check_identity(row)
    stored = (checked_bytes if checked else stored_bytes)(folder, row, data)
    if stored is not None:
        img = decode(stored, folder.channels, row_where(row), folder.hw)
        return RowImage(img, None, stored[:8] == PNG_SIGNATURE)
    scene = rerender(folder, row)
    return RowImage(scene.image, scene.target, True)


def image_of(folder, row, checked: bool = False) -> np.ndarray:
    """The image of a row as an (H, W, C) uint8 array (see `load`)."""
    return load(folder, row, checked=checked).image


def rerender(folder, row):
    """The Scene of a row, re-made from the row alone: its own seed key, its parameters."""
    from ..scene import make_scene
    from ..space.streams import RENDER, lazy_image_rng

    built = folder.built
    try:
        rng = lazy_image_rng(int(row["seed"]), int(row["split_index"]), int(row["index"]), RENDER)
        return make_scene(built.plan, built.source, built.background, built.plan.split(row["split"]), row, rng=rng)
    except (IndexError, KeyError, TypeError, ValueError, OverflowError) as exc:
        # a row edited or damaged after generation: a class or instance the spec has not, a
        # scale that is not positive, a value that is not a number
        reason = " ".join(str(exc).split()) or type(exc).__name__
        raise ImageError(f"the row cannot be re-rendered: {reason}", where=row_where(row)) from None
