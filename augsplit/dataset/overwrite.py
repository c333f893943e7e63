"""`--overwrite`: remove augsplit's own layout from a folder, and nothing else.

Ours: spec.json, dataset.json, manifest/ and distractors/ holding only `split=<name>/part-*`
files, images/ holding only `<split>/<split>-NNNNNNN.<ext>` files, shards/ holding only
`split=<name>/part-*.tar` files, the report folders
(audit/, score/, preview/) holding only report files, and temporaries of atomic writes. A
folder holding anything else (symbolic links included) is refused in one line listing up to
five of the strangers. The spec being read and the working directory are never removed.

Removal moves the layout aside into one hidden folder inside the output folder, spec.json
first (from then on no command opens the folder as a dataset), then deletes that folder; a
crash half-way leaves no usable part of the old dataset, and the next --overwrite sweeps it.
"""

from __future__ import annotations

import os
import shutil
import stat
import uuid
from pathlib import Path

from ..errors import DatasetError
from . import layout as lay

TRASH_PREFIX = ".augsplit-overwrite-"
SHOWN = 5  # strangers named in the refusal


def _is_file(p: Path) -> bool:
    return stat.S_ISREG(p.lstat().st_mode)


def _is_dir(p: Path) -> bool:
    return stat.S_ISDIR(p.lstat().st_mode)


def _table_strangers(d: Path, pattern=lay.PART_RE) -> list[Path]:
    """Strangers in a `split=<name>/<file>` folder whose own files match `pattern`."""
    out = []
    for sub in sorted(d.iterdir()):
        if not (sub.name.startswith("split=") and _is_dir(sub)):
            out.append(sub)
            continue
        out += [f for f in sorted(sub.iterdir())
                if not (pattern.fullmatch(lay.final_name(f.name)) and _is_file(f))]
    return out


def _image_strangers(d: Path) -> list[Path]:
    out = []
    for sub in sorted(d.iterdir()):
        if not _is_dir(sub):
            out.append(sub)
            continue
        for f in sorted(sub.iterdir()):
            m = lay.IMAGE_RE.fullmatch(lay.final_name(f.name))  # an image, or the temporary of one
            if not (m and m.group("split") == sub.name and _is_file(f)):
                out.append(f)
    return out


def _report_strangers(d: Path) -> list[Path]:
    return [f for f in sorted(d.iterdir())
            if not (Path(lay.final_name(f.name)).suffix in lay.REPORT_SUFFIXES and _is_file(f))]


def classify(out: Path) -> tuple[list[Path], list[Path]]:
    """(our top-level entries, strangers anywhere) of a folder."""
    ours, strangers = [], []
    for entry in sorted(out.iterdir()):
        name = entry.name
        if entry.is_symlink():
            strangers.append(entry)
        elif lay.final_name(name) in (lay.SPEC_FILE, lay.SUMMARY_FILE):  # or the temporary of one
            (ours if _is_file(entry) else strangers).append(entry)
        elif name in lay.TABLES and _is_dir(entry):
            ours.append(entry)
            strangers += _table_strangers(entry)
        elif name == lay.SHARDS_DIR and _is_dir(entry):
            ours.append(entry)
            strangers += _table_strangers(entry, lay.TAR_RE)
        elif name == lay.IMAGES_DIR and _is_dir(entry):
            ours.append(entry)
            strangers += _image_strangers(entry)
        elif name in lay.REPORT_DIRS and _is_dir(entry):
            ours.append(entry)
            strangers += _report_strangers(entry)
        elif name.startswith(TRASH_PREFIX) and _is_dir(entry):
            ours.append(entry)
            strangers += classify(entry)[1]  # an interrupted --overwrite's trash: our layout only
        else:
            strangers.append(entry)
    return ours, strangers


def inside(path: Path, folder: Path) -> bool:
    path, folder = os.path.realpath(path), os.path.realpath(folder)
    return os.path.commonpath([path, folder]) == folder


def clear(out: str | Path, spec_path: str | Path | None = None) -> None:
    """Remove augsplit's layout from `out` (see the module docstring); refuse anything else."""
    out = Path(out)
    where = str(out)
    if not out.exists():
        return
    if not out.is_dir():
        raise DatasetError("--overwrite needs a folder, not a file", where=where)
    if spec_path is not None and inside(spec_path, out):
        raise DatasetError(f"the spec {spec_path} lies inside the output folder, which --overwrite would empty; "
                           "move the spec out or choose another --out", where=where)
    try:
        ours, strangers = classify(out)
    except OSError as exc:
        raise DatasetError(f"cannot list the folder: {exc.strerror}", where=str(exc.filename or out)) from None
    if strangers:
        names = ", ".join(str(p.relative_to(out)) for p in strangers[:SHOWN])
        more = f" and {len(strangers) - SHOWN} more" if len(strangers) > SHOWN else ""
        raise DatasetError(f"refusing --overwrite: the folder holds what augsplit did not make: {names}{more}; "
                           "move them away or choose another --out", where=where)
    cwd = Path.cwd()
    for entry in ours:
        if inside(cwd, entry):
            raise DatasetError(f"the working directory lies inside {entry.name}/, which --overwrite would remove; "
                               "run from elsewhere", where=where)
    if not ours:
        return
    trash = out / f"{TRASH_PREFIX}{uuid.uuid4().hex[:12]}"
    # spec.json first: from its move on, no command takes what is left for a dataset
    first = sorted(ours, key=lambda p: (p.name != lay.SPEC_FILE, p.name != lay.SUMMARY_FILE, p.name))
    try:
        trash.mkdir()
        for entry in first:
            os.rename(entry, trash / entry.name)
        shutil.rmtree(trash)
    except OSError as exc:
        raise DatasetError(f"cannot remove the old dataset: {exc.strerror}; what is left is swept by the next "
                           "--overwrite", where=str(exc.filename or out)) from None
