"""A dataset folder's manifest rows as the audit's driver holds them: one table without the
image bytes (those stay in the parts; workers read their own), the table row of each part's
rows, and single rows, from column arrays, for the few images the driver itself looks at
(thumbnails, look-alike judging)."""

from __future__ import annotations

import numpy as np

from ..dataset import layout as lay
from ..dataset.rows import OFFSET_COLUMN, PART_COLUMN, read_rows, table_schema
from .parallel import noise_image, part_rows

PARTS_CACHED = 8  # parts whose rows are held while the driver fetches images


class FolderRows:
    def __init__(self, folder, columns):
        self.folder = folder
        have = table_schema(lay.MANIFEST_DIR).names
        df = read_rows(folder, columns=[c for c in dict.fromkeys(columns) if c in have and c != "image_bytes"],
                       positions=True)
        self.part = df.pop(PART_COLUMN).to_numpy(np.int64)
        self.offset = df.pop(OFFSET_COLUMN).to_numpy(np.int64)
        self.df = df
        n_parts = len(folder.parts_of())
        order = np.lexsort((self.offset, self.part))
        bounds = np.concatenate([[0], np.cumsum(np.bincount(self.part, minlength=n_parts))])
        self.part_rows = [order[bounds[k]: bounds[k + 1]] for k in range(n_parts)]  # by offset in the part
        self._parts: dict[int, list] = {}

    def row(self, i: int) -> dict:
        """Table row i as a mapping of every column (its part's rows are read and kept a while)."""
        k = int(self.part[i])
        rows = self._parts.get(k)
        if rows is None:
            if len(self._parts) >= PARTS_CACHED:
                self._parts.pop(next(iter(self._parts)))
            rows = self._parts[k] = part_rows(self.folder, k)
        return rows[int(self.offset[i])]

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
