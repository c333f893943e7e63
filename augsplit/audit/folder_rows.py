"""A dataset folder's manifest rows as the audit's driver holds them: one table without the
image bytes (those stay in the parts; workers read their own), the table row of each part's
rows, and single rows, from column arrays, for the few images the driver itself looks at
(thumbnails, look-alike judging)."""

from __future__ import annotations

import numpy as np

from ..dataset import layout as lay
from ..dataset.rows import OFFSET_COLUMN, PART_COLUMN, read_column, read_rows, table_schema
from .parallel import noise_image

PARTS_CACHED = 8  # parts whose image column is held while the driver fetches images


class FolderRows:
    def __init__(self, folder):
        self.folder = folder
        cols = [c for c in table_schema(lay.MANIFEST_DIR).names if c != "image_bytes"]
        df = read_rows(folder, columns=cols, positions=True)
        self.part = df.pop(PART_COLUMN).to_numpy(np.int64)
        self.offset = df.pop(OFFSET_COLUMN).to_numpy(np.int64)
        self.df = df
        self.columns = {c: df[c].to_numpy() for c in df.columns}
        n_parts = len(folder.parts_of())
        order = np.lexsort((self.offset, self.part))
        bounds = np.concatenate([[0], np.cumsum(np.bincount(self.part, minlength=n_parts))])
        self.part_rows = [order[bounds[k]: bounds[k + 1]] for k in range(n_parts)]  # by offset in the part
        self._images: dict[int, object] = {}

    def row(self, i: int) -> dict:
        """Table row i as a mapping (with its embedded image bytes, if it has any)."""
        i = int(i)
        row = {c: v[i] for c, v in self.columns.items()}
        if not _named(row.get("file")) and not _named(row.get("tar_file")):
            row["image_bytes"] = self._bytes(i)
        return row

    def _bytes(self, i: int):
        k = int(self.part[i])
        col = self._images.get(k)
        if col is None:
            if len(self._images) >= PARTS_CACHED:
                self._images.pop(next(iter(self._images)))
            col = self._images[k] = read_column(self.folder.parts_of()[k], "image_bytes")
        return col[int(self.offset[i])].as_py()

    def image(self, i: int) -> np.ndarray:
        """The stored (or re-rendered) image of row i; a noise stand-in when it cannot be read
        (the RowCache records why, and the image_files check fails on it)."""
        from ..dataset.images import ImageError, image_of

        try:
            return image_of(self.folder, self.row(i))
        except ImageError:
            return noise_image(i, self.folder.hw, self.folder.channels)

    def rendered(self, i: int) -> np.ndarray:
        """Row i re-rendered from its parameters."""
        from ..dataset.images import rerender

        return rerender(self.folder, self.row(i)).image


def _named(v) -> bool:
    return isinstance(v, str) and bool(v)
