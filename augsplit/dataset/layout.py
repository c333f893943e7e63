"""The names of augsplit's own dataset layout, and the paths built from them.

Every path below a dataset folder is made here, one checked component at a time, so a name
read from a spec or a manifest can never point outside the folder (`..`, `/`, absolute).
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path

from ..errors import DatasetError
from ..manifest import PARTITION

SPEC_FILE, SUMMARY_FILE = "spec.json", "dataset.json"
MANIFEST_DIR, DISTRACTOR_DIR, IMAGES_DIR = "manifest", "distractors", "images"
SHARDS_DIR = "shards"  # --store tar: shards/split=<name>/part-NNNNNN.tar
AUDIT_DIR, SCORE_DIR, PREVIEW_DIR = "audit", "score", "preview"  # default report folders of each command
TABLES = (MANIFEST_DIR, DISTRACTOR_DIR)
REPORT_DIRS = (AUDIT_DIR, SCORE_DIR, PREVIEW_DIR)
OWN_ENTRIES = (SPEC_FILE, SUMMARY_FILE, *TABLES, IMAGES_DIR, SHARDS_DIR, *REPORT_DIRS)

PART_RE = re.compile(r"part-(\d{6,})\.parquet")
TAR_RE = re.compile(r"part-(\d{6,})\.tar")
IMAGE_RE = re.compile(r"(?P<split>.+)-\d{7,}\.(png|jpg|webp)")
REPORT_SUFFIXES = (".json", ".html", ".csv", ".png")  # what audit, score and preview write


def is_dataset(path) -> bool:
    """A folder holding an augsplit dataset, whole or not: its spec.json or its manifest parts
    (a folder missing spec.json is then refused as every command refuses it, rather than
    audited as a table with no axes, or written into as if it were any folder)."""
    p = Path(path)
    if not p.is_dir():
        return False
    manifest = p / MANIFEST_DIR
    return (_recorded_spec(p / SPEC_FILE) or (p / SUMMARY_FILE).is_file()
            or (manifest.is_dir() and any(q.name.startswith("split=") for q in manifest.iterdir())))


def _recorded_spec(f: Path) -> bool:
    """Whether `f` is a spec.json augsplit recorded (its spec_hash), not a user's spec that
    happens to be named spec.json; one that cannot be read counts (a damaged dataset is
    refused as one, not taken for a plain folder)."""
    if not f.is_file():
        return False
    from .folder import read_metadata
    from .images import ImageError

    try:  # a spec.json linked out of its folder counts, unread
        doc = json.loads(read_metadata(f.parent, f.name))
    except (OSError, ValueError, ImageError):
        return True
    return not isinstance(doc, dict) or "spec_hash" in doc


# the temporary name of an atomic write (io.temporary_name): .<final name>.tmp-<pid>-<hex>
TEMPORARY_RE = re.compile(r"\.(?P<final>.+)\.tmp-\d+(?:-[0-9a-f]+)?")


def final_name(name: str) -> str:
    """The name a temporary of an atomic write stands for; any other name, itself."""
    m = TEMPORARY_RE.fullmatch(name)
    return m.group("final") if m else name


def is_temporary(name: str) -> bool:
    """Whether `name` has the shape of an atomic write's temporary. Whether it is ours to sweep
    depends as well on its final name being one augsplit writes where it lies: a user's hidden
    `.env.tmpl` or `.notes.tmp` has neither."""
    return TEMPORARY_RE.fullmatch(name) is not None


def component(name: str, what: str = "name") -> str:
    """`name` as one path component: never empty, `.`, `..`, or holding a separator."""
    if (not isinstance(name, str) or name in ("", ".", "..") or "/" in name or "\\" in name or "\x00" in name
            or os.sep in name):
        raise DatasetError(f"{name!r} cannot be a file or folder name inside the dataset folder", where=what)
    return name


def partition_dir(split: str) -> str:
    return f"{PARTITION}={component(split, 'split')}"


def split_of(part: Path) -> str:
    """The split a part file belongs to, from its `split=<name>` folder."""
    return Path(part).parent.name.split("=", 1)[1]


def part_name(shard: int) -> str:
    return f"part-{int(shard):06d}.parquet"


def part_path(root: str | Path, table: str, split: str, shard: int) -> Path:
    """Where one shard's rows of one table go: <root>/<table>/split=<name>/part-<shard>.parquet."""
    return Path(root) / component(table, "table") / partition_dir(split) / part_name(shard)


def part_files(root: str | Path, table: str = MANIFEST_DIR) -> list[Path]:
    """The committed part files of a table (temporaries are hidden names, so never listed).
    A folder on the way that cannot be listed is a one-line DatasetError, not an empty table."""
    out = []
    for split_dir in listing(Path(root) / table):
        if split_dir.name.startswith(f"{PARTITION}=") and split_dir.is_dir():
            out += [Path(e.path) for e in listing(Path(split_dir.path)) if PART_RE.fullmatch(e.name)]
    return sorted(out)


def listing(folder: Path) -> list[os.DirEntry]:
    """The entries of `folder`; none if it is missing (or not a folder); a one-line
    DatasetError naming it if it cannot be listed (no permission, an I/O error)."""
    try:
        with os.scandir(folder) as it:
            return list(it)
    except (FileNotFoundError, NotADirectoryError):
        return []
    except OSError as exc:
        raise DatasetError(f"cannot be listed: {exc.strerror}", where=str(folder)) from None


def shard_of(part: Path) -> int:
    m = PART_RE.fullmatch(Path(part).name)
    return int(m.group(1)) if m else -1


def expected_parts(totals: dict[str, int], shard_size: int) -> set[tuple[str, int]]:
    """(split, shard) of every manifest part a dataset of these split sizes and shard size has."""
    return {(name, k) for name, n in totals.items() for k in range(-(-int(n) // int(shard_size)))}


def tar_relpath(split: str, shard: int) -> str:
    """A shard's tar relative to the dataset folder (the manifest's `tar_file` column)."""
    return f"{SHARDS_DIR}/{partition_dir(split)}/part-{int(shard):06d}.tar"


def image_dir(root: str | Path, split: str) -> Path:
    return Path(root) / IMAGES_DIR / component(split, "split")


def image_relpath(split: str, image_id: str, suffix: str) -> str:
    """A stored image's path relative to the dataset folder (the manifest's `file` column)."""
    return f"{image_folder_relpath(split)}/{component(image_id + suffix, 'image id')}"


def image_folder_relpath(split: str) -> str:
    """The folder of a split's stored images, relative to the dataset folder."""
    return f"{IMAGES_DIR}/{component(split, 'split')}"


def no_symlink_below(root: Path, path: Path) -> Path:
    """`path` (below `root`), refusing when any existing folder or file on the way is a
    symbolic link: a write through one could land outside the dataset folder."""
    root, path = Path(root), Path(path)
    rel = path.relative_to(root)
    p = root
    for part in rel.parts:
        p = p / part
        if p.is_symlink():
            raise DatasetError("a symbolic link inside the dataset folder; augsplit writes only to its own folders",
                               where=str(p))
    return path
