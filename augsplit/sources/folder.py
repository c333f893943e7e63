"""The user's own sprites: a folder with one subfolder per class and image files as instances,
plus the image reading every file-based source shares (one clear error per bad file).
"""

from __future__ import annotations

import os
from pathlib import Path

import cv2
import numpy as np

from ..errors import SourceError, SpecError
from ..limits import MAX_CLASSES, MAX_IMAGE_FILE_BYTES
from ..names import check_name
from .base import ALPHA_THRESHOLD, PixelBudget, Sprite, SpriteTable, parse_colour
from .header import image_size

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".webp", ".tif", ".tiff")


def is_hidden(path: Path) -> bool:
    return path.name.startswith(".")


def read_image(path: Path, budget: PixelBudget | None = None) -> np.ndarray:
    """Decode an image file to uint8 (h, w, C) with C = 1, 3 (RGB) or 4 (RGBA); SourceError if it
    cannot be used. The file must be a regular file of at most MAX_IMAGE_FILE_BYTES, and the
    size its header announces must fit `budget` (default: one sprite) before it is decoded.
    Reads bytes first so non-ASCII paths work and decode errors stay quiet."""
    where = str(path)
    budget = budget or PixelBudget("MAX_SPRITE_PIXELS", "MAX_SPRITE_PIXELS")
    if path.suffix.lower() not in IMAGE_SUFFIXES:
        raise SourceError(f"not an image file (expected one of {', '.join(IMAGE_SUFFIXES)})", where=where)
    try:
        if not path.is_file():  # a FIFO or device could block or never end
            raise SourceError("not a regular file", where=where)
        size = path.stat().st_size
        if size > MAX_IMAGE_FILE_BYTES:
            raise SourceError(f"the file is {size:,} bytes, above the limit of {MAX_IMAGE_FILE_BYTES:,} "
                              "(limits.MAX_IMAGE_FILE_BYTES)", where=where)
        data = np.fromfile(path, dtype=np.uint8, count=MAX_IMAGE_FILE_BYTES + 1)
    except OSError as err:
        raise SourceError(f"cannot read file: {err.strerror or err}", where=where) from None
    if data.size == 0:
        raise SourceError("file is empty (0 bytes)", where=where)
    dims = image_size(memoryview(data))
    if dims is None:
        raise SourceError("not a readable image (no PNG, JPEG, BMP, WebP or TIFF header, or a broken one)",
                          where=where)
    budget.take(*dims, where=where)
    img = cv2.imdecode(data, cv2.IMREAD_UNCHANGED)
    if img is None:
        raise SourceError("not a readable image (corrupt or not really a " + path.suffix.lower() + ")", where=where)
    if img.size == 0:
        raise SourceError(f"image has zero size ({img.shape})", where=where)
    if img.shape[1] * img.shape[0] > dims[0] * dims[1]:  # never: the header is what was decoded
        raise SourceError(f"decoded {img.shape[1]}x{img.shape[0]} px, but the header says {dims[0]}x{dims[1]}",
                          where=where)
    if img.dtype == np.uint16:  # 16-bit PNG/TIFF: keep the high byte, the usual 8-bit reduction
        img = (img >> 8).astype(np.uint8)
    elif img.dtype != np.uint8:
        raise SourceError(f"unsupported pixel type {img.dtype}; use 8- or 16-bit images", where=where)
    if img.ndim == 2:
        img = img[..., None]
    if img.shape[2] == 3:
        img = cv2.cvtColor(img, cv2.COLOR_BGR2RGB)
    elif img.shape[2] == 4:
        img = cv2.cvtColor(img, cv2.COLOR_BGRA2RGBA)
    elif img.shape[2] == 2:  # grey + alpha
        img = np.concatenate([np.repeat(img[..., :1], 3, axis=2), img[..., 1:]], axis=2)
    return np.ascontiguousarray(img)


def to_rgb(img: np.ndarray) -> np.ndarray:
    return np.repeat(img, 3, axis=2) if img.shape[2] == 1 else img[..., :3]


class SpriteFolder(SpriteTable):
    """`path/<class>/<instance image>`: classes sorted by folder name, instances by file name.

    Transparency, in order of precedence: a mask file `<stem><mask_suffix>.png` beside the image
    (grey levels are alpha); else the image's own alpha channel; else pixels exactly equal to
    `key_colour` (an RGB triple) are transparent; else the image is opaque. Files and folders
    whose names start with '.' are ignored. Every image is read and checked when built.
    """

    def __init__(self, path, key_colour=None, mask_suffix: str = "_mask"):
        root = Path(path)
        if not root.is_dir():
            raise SourceError("sprite folder does not exist or is not a folder", where=str(root))
        if not mask_suffix:
            raise SpecError("mask_suffix must not be empty", where="objects.mask_suffix")
        self.path, self.mask_suffix = root, mask_suffix
        self.key_colour = None if key_colour is None else parse_colour(key_colour, "objects.key_colour")
        entries = sorted(p for p in root.iterdir() if not is_hidden(p))
        stray = [p for p in entries if not p.is_dir()]
        if stray:
            raise SourceError("expected only one subfolder per class here, found a file", where=str(stray[0]))
        if not entries:
            raise SourceError("sprite folder is empty: expected one subfolder per class", where=str(root))
        if len(entries) > MAX_CLASSES:
            raise SourceError(f"{len(entries):,} class folders, above the limit of {MAX_CLASSES:,} "
                              "(limits.MAX_CLASSES)", where=str(root))
        for d in entries:  # class and instance names are folder and file names: one rule for them all
            check_name(d.name, str(d), SourceError)
        self.classes = tuple(p.name for p in entries)
        self.files: tuple[tuple[Path, ...], ...] = tuple(self._instance_files(d) for d in entries)
        budget = PixelBudget("MAX_SPRITE_PIXELS", "MAX_SOURCE_PIXELS")
        self._sprites = tuple(
            tuple(self._load(f, ci, inst, budget) for inst, f in enumerate(files))
            for ci, files in enumerate(self.files))

    def _instance_files(self, folder: Path) -> tuple[Path, ...]:
        files = sorted(p for p in folder.iterdir() if not is_hidden(p))
        for p in files:
            check_name(p.name, str(p), SourceError)
            if p.is_dir():
                raise SourceError("class folders hold image files, not subfolders", where=str(p))
            if p.suffix.lower() not in IMAGE_SUFFIXES:
                raise SourceError(f"not an image file (expected one of {', '.join(IMAGE_SUFFIXES)})", where=str(p))
        images = [p for p in files if not p.stem.endswith(self.mask_suffix)]
        masks = {p.stem for p in files if p.stem.endswith(self.mask_suffix)}
        orphans = masks - {p.stem + self.mask_suffix for p in images}
        if orphans:
            orphan = next(p for p in files if p.stem in orphans)
            raise SourceError("mask file has no image beside it", where=str(orphan))
        if not images:
            raise SourceError("class folder has no images", where=str(folder))
        return tuple(images)

    def read_files(self) -> list[Path]:
        """Every file this source read, in order: each instance image, then its mask file."""
        out = []
        for files in self.files:
            for f in files:
                mask = self._mask_file(f)
                out += [f] if mask is None else [f, mask]
        return out

    def _mask_file(self, image: Path) -> Path | None:
        for p in sorted(image.parent.glob(image.stem + self.mask_suffix + ".*")):
            if p.stem == image.stem + self.mask_suffix:
                return p
        return None

    def _load(self, file: Path, ci: int, inst: int, budget: PixelBudget) -> Sprite:
        img = read_image(file, budget)
        rgba = np.empty(img.shape[:2] + (4,), dtype=np.uint8)
        rgba[..., :3] = to_rgb(img)
        mask_file = self._mask_file(file)
        if mask_file is not None:
            mask = read_image(mask_file)  # one sprite's worth; must match the image's size
            if mask.shape[:2] != img.shape[:2]:
                raise SourceError(f"mask is {mask.shape[1]}x{mask.shape[0]} but its image is "
                                  f"{img.shape[1]}x{img.shape[0]}", where=str(mask_file))
            rgba[..., 3] = cv2.cvtColor(to_rgb(mask), cv2.COLOR_RGB2GRAY)
        elif img.shape[2] in (2, 4):
            rgba[..., 3] = img[..., -1]
        elif self.key_colour is not None:
            rgba[..., 3] = np.where(np.all(rgba[..., :3] == self.key_colour, axis=2), 0, 255)
        else:
            rgba[..., 3] = 255
        if not (rgba[..., 3] > ALPHA_THRESHOLD * 255).any():
            raise SourceError(f"sprite is fully transparent (no pixel with alpha above {ALPHA_THRESHOLD:.0%})",
                              where=str(mask_file or file))
        return Sprite.from_rgba(rgba, self.classes[ci], ci, inst, where=str(file))

    def __repr__(self) -> str:
        n = sum(len(f) for f in self.files)
        return f"SpriteFolder({os.fspath(self.path)!r}, key_colour={self.key_colour})  # {len(self.classes)} classes, {n} sprites"
