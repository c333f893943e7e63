"""`augsplit verify`: a dataset folder is exactly what its spec says it is.

Checks: every shard is present; each row has its image and each image file its row; counts
per split and class match the plan; each row's seed key is the plan's; stored images decode
to the canvas, inside the folder (a path out of it, a FIFO, a device or an oversized file is
a finding, never read) and, for lossless formats, match each row's checksum; and each image
re-renders identically from its row alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .dataset import layout as lay
from .dataset import open_dataset, read_rows
from .dataset.images import PNG_SIGNATURE, ImageError, decode, rerender, row_where, stored_bytes
from .errors import DatasetError
from .scene import pixel_sha256

SHOWN = 5  # problems of one kind listed by name


@dataclass
class Report:
    checked: int = 0
    rerendered: int = 0
    problems: list = field(default_factory=list)

    def add(self, what: str) -> None:
        self.problems.append(what)

    def add_each(self, items: list[str], more: str) -> None:
        """The first few items by name, then how many more."""
        for item in items[:SHOWN]:
            self.add(item)
        if len(items) > SHOWN:
            self.add(f"... {len(items) - SHOWN} more {more}")

    @property
    def ok(self) -> bool:
        return not self.problems


def verify(root: str | Path, sample: int | None = None, seed: int = 0, allow_incomplete: bool = False) -> Report:
    """Verify a dataset; `sample` re-renders only that many rows (all when None).
    An unfinished folder is refused unless `allow_incomplete` (then its absence of
    dataset.json is itself a finding)."""
    if sample is not None and (isinstance(sample, bool) or not isinstance(sample, (int, np.integer)) or sample < 0):
        raise DatasetError(f"the sample size must be a whole number >= 0, got {sample!r}", where="--sample")
    folder = open_dataset(root, allow_incomplete=allow_incomplete)
    root = folder.root
    plan = folder.plan
    rep = Report()
    if not folder.complete:
        rep.add("dataset.json is missing: generation did not finish (rerun generate --resume, or --finalize)")
    df = read_rows(folder)
    if df.empty:
        raise DatasetError("the dataset has no manifest rows", where=str(root / lay.MANIFEST_DIR))
    rep.checked = len(df)
    dup = df["image_id"].duplicated()
    if dup.any():
        rep.add(f"{int(dup.sum())} duplicated image ids, e.g. {df['image_id'][dup].iloc[0]}")
    for s in plan.splits:
        got = df[df["split"] == s.name]
        if len(got) != s.total:
            rep.add(f"split {s.name}: {len(got)} rows, the plan says {s.total}")
        counts = got["class_index"].value_counts().to_dict()
        for c, n in enumerate(s.counts):
            if counts.get(c, 0) != n:
                rep.add(f"split {s.name}, class {plan.classes[c]}: {counts.get(c, 0)} rows, the plan says {n}")
                break
        keyed = (got["split_index"] != s.index) | (got["seed"] != plan.seed)
        if keyed.any():
            rep.add(f"split {s.name}: {int(keyed.sum())} rows whose seed key (seed, split_index) is not the plan's, "
                    f"e.g. {got['image_id'][keyed].iloc[0]}")
    _check_files(root, df, rep)
    _check_pixels(folder, df, rep, sample, seed)
    return rep


def _check_files(root: Path, df, rep: Report) -> None:
    """Every image file under images/ belongs to a row (rows' own files are read later)."""
    files = df["file"].fillna("")
    listed = set(files[files != ""])
    images = root / lay.IMAGES_DIR
    on_disk = ({str(p.relative_to(root)) for p in images.rglob("*") if p.is_file() or p.is_symlink()}
               if images.is_dir() else set())
    rep.add_each([f"image without a row: {rel}" for rel in sorted(on_disk - listed)], "images without rows")


def _check_pixels(folder, df, rep: Report, sample, seed) -> None:
    """Stored images: inside the box, decodable, lossless ones equal to the checksum. Then the
    re-render of every (or a sample of) row."""
    broken, bad_sum, bad_render = [], [], []
    records = df.to_dict("records")
    for row in records:
        where = row_where(row)
        try:
            data = stored_bytes(folder, row)
            if data is not None:
                img = decode(data, folder.channels, where, folder.hw)
                if data.startswith(PNG_SIGNATURE) and pixel_sha256(img) != row["sha256"]:
                    bad_sum.append(row["image_id"])
        except ImageError as exc:
            broken.append(f"{exc.where}: {exc.message}")
    rows = np.arange(len(records))
    if sample is not None and sample < len(records):
        rows = np.sort(np.random.default_rng(seed).choice(len(records), size=sample, replace=False))
    for i in rows:
        row = records[int(i)]
        rep.rerendered += 1
        if pixel_sha256(rerender(folder, row).image) != row["sha256"]:
            bad_render.append(row["image_id"])
    rep.add_each(broken, "rows whose image cannot be read")
    if bad_sum:
        rep.add(f"{len(bad_sum)} stored images do not match their checksum, e.g. {', '.join(bad_sum[:3])}")
    if bad_render:
        rep.add(f"{len(bad_render)} images do not re-render identically from their rows, e.g. {', '.join(bad_render[:3])}")
