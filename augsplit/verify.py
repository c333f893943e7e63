"""`augsplit verify`: a dataset folder is exactly what its spec says it is.

Checks: the summary and every shard are present; each row has its image and each image
file its row; counts per split and class match the plan; stored pixels match each row's
checksum (lossless formats); and each image re-renders identically from its row alone.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import manifest as mf
from .errors import DatasetError
from .generate import decode, open_dataset_spec
from .scene import make_scene, pixel_sha256

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # only PNG is lossless, so only PNG pixels must match the checksum


@dataclass
class Report:
    checked: int = 0
    rerendered: int = 0
    problems: list = field(default_factory=list)

    def add(self, what: str) -> None:
        self.problems.append(what)

    @property
    def ok(self) -> bool:
        return not self.problems


def verify(root: str | Path, sample: int | None = None, seed: int = 0) -> Report:
    """Verify a dataset; `sample` re-renders only that many rows (all when None)."""
    root = Path(root)
    built = open_dataset_spec(root)
    plan = built.plan
    rep = Report()
    if not (root / mf.SUMMARY_FILE).exists():
        rep.add("dataset.json is missing: generation did not finish (rerun generate --resume, or --finalize)")
    df = mf.read_manifest(root)
    if df.empty:
        raise DatasetError("the dataset has no manifest rows", where=str(root / mf.MANIFEST_DIR))
    rep.checked = len(df)
    if df["image_id"].duplicated().any():
        rep.add(f"{int(df['image_id'].duplicated().sum())} duplicated image ids, e.g. {df['image_id'][df['image_id'].duplicated()].iloc[0]}")
    for s in plan.splits:
        got = df[df["split"] == s.name]
        if len(got) != s.total:
            rep.add(f"split {s.name}: {len(got)} rows, the plan says {s.total}")
        counts = got["class_index"].value_counts().to_dict()
        for c, n in enumerate(s.counts):
            if counts.get(c, 0) != n:
                rep.add(f"split {s.name}, class {plan.classes[c]}: {counts.get(c, 0)} rows, the plan says {n}")
                break
    unknown = set(df["split"]) - {s.name for s in plan.splits}
    if unknown:
        rep.add(f"rows of splits the spec does not have: {', '.join(sorted(unknown))}")
    channels = 1 if built.spec.canvas.mode == "gray" else 3
    # files <-> rows
    files = df["file"].fillna("")
    listed = set(files[files != ""])
    on_disk = {str(p.relative_to(root)) for p in (root / mf.IMAGES_DIR).rglob("*") if p.is_file()} if (root / mf.IMAGES_DIR).exists() else set()
    for rel in sorted(listed - on_disk)[:5]:
        rep.add(f"row's image is missing: {rel}")
    if len(listed - on_disk) > 5:
        rep.add(f"... {len(listed - on_disk) - 5} more missing images")
    for rel in sorted(on_disk - listed)[:5]:
        rep.add(f"image without a row: {rel}")
    if len(on_disk - listed) > 5:
        rep.add(f"... {len(on_disk - listed) - 5} more images without rows")
    # stored pixels and re-rendering
    rows = np.arange(len(df))
    if sample is not None and sample < len(df):
        rows = np.sort(np.random.default_rng(seed).choice(len(df), size=sample, replace=False))
    bad_sum, bad_render = [], []
    for i in range(len(df)):
        row = df.iloc[i]
        data = _stored_bytes(root, row)
        if data is not None and data.startswith(PNG_MAGIC) and pixel_sha256(decode(data, channels)) != row["sha256"]:
            bad_sum.append(row["image_id"])
    for i in rows:
        row = df.iloc[int(i)]
        split = plan.split(row["split"])
        scene = make_scene(plan, built.source, built.background, split, row)
        rep.rerendered += 1
        if pixel_sha256(scene.image) != row["sha256"]:
            bad_render.append(row["image_id"])
    if bad_sum:
        rep.add(f"{len(bad_sum)} stored images do not match their checksum, e.g. {', '.join(bad_sum[:3])}")
    if bad_render:
        rep.add(f"{len(bad_render)} images do not re-render identically from their rows, e.g. {', '.join(bad_render[:3])}")
    return rep


def _stored_bytes(root: Path, row) -> bytes | None:
    """The encoded image a row points at (its file, or its embedded bytes); None if absent."""
    if row.get("file"):
        p = root / row["file"]
        return p.read_bytes() if p.exists() else None
    data = row.get("image_bytes")
    if data is not None and not (isinstance(data, float) and np.isnan(data)):
        return bytes(data)
    return None
