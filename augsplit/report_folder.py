"""The folders audit, score and preview write their reports to, and what augsplit may replace
there.

A report folder is either one of a dataset's own report folders (`<dataset>/audit`, `score`,
`preview`: augsplit's, like the rest of the dataset) or a folder outside every dataset. In the
second, a report file replaces only a file augsplit wrote there before, as the folder's hidden
list (REPORTS_LIST) records; a file of the same name that the user made, or that is one of the
command's own inputs, is refused by name and left as it is. Anywhere else inside a dataset (its
images, its manifest) a report would become a stray file the dataset's checks refuse.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from .dataset import layout as lay
from .errors import DatasetError
from .io import check_folder_target, ensure_folder, write_text_atomic

REPORTS_LIST = ".augsplit-reports.json"  # {"files": [names augsplit wrote in this folder]}


def dataset_root(path) -> Path | None:
    """The dataset folder `path` is, or lies in (spec.json or manifest parts), else None."""
    p = Path(os.path.realpath(path))
    for d in (p, *p.parents):
        if lay.is_dataset(d):
            return d
    return None


def check_report_folder(out, names, inputs=()) -> tuple[Path, bool, set[str]]:
    """Whether the report files `names` may be written in `out` (see the module docstring):
    one-line DatasetError naming the path if not; creates nothing. `inputs` are the command's
    input files and folders. Returns the folder, whether it is a dataset's own report folder,
    and the files augsplit recorded writing there."""
    p = check_folder_target(out)
    root = dataset_root(p if p.exists() else p.absolute().parent)
    own = root is not None and Path(os.path.realpath(p.absolute().parent)) == root and p.name in lay.REPORT_DIRS
    if root is not None and not own:
        raise DatasetError(f"lies inside the dataset folder {root}, where a report would become a stray file; "
                           f"give a folder outside it (or its own {', '.join(lay.REPORT_DIRS)} folder)", where=str(p))
    for src in inputs:  # a report inside an input folder would be read as part of it next time
        if os.path.isdir(src) and not lay.is_dataset(src) \
                and Path(os.path.realpath(p)).is_relative_to(os.path.realpath(src)):
            raise DatasetError(f"lies inside the input folder {src}, where the report would be read as part of "
                               "the input next time; give a folder outside it", where=str(p))
    listed = _listed(p)
    earlier = None
    for name in names:
        q = p / name
        if not os.path.lexists(q):
            continue
        if any(os.path.lexists(src) and os.path.samefile(q, src) for src in inputs):
            raise DatasetError("is an input of this command; augsplit never replaces its input, give another --out",
                               where=str(q))
        if q.is_symlink() or not q.is_file():
            raise DatasetError("exists and is not a regular file; give another --out", where=str(q))
        if not own and name not in listed:
            if earlier is None:  # the reports' JSON is parsed only when a name is not on the list
                earlier = _earlier_reports(p)
                listed |= earlier
            if name not in listed:
                raise DatasetError("exists and augsplit has no record of writing it here (its list, " + REPORTS_LIST
                                   + ", names what it wrote); give another --out, or move the file", where=str(q))
    return p, own, listed


def report_folder(out, names, inputs=()) -> Path:
    """`out`, made if missing (its parent must exist), once `check_report_folder` allows the
    report files `names` there. Records the names in the folder's list before anything is
    written, so a run cut short leaves only files a later run may replace."""
    p, own, listed = check_report_folder(out, names, inputs)
    folder = ensure_folder(p)
    if not own and not set(names) <= _listed(folder):  # reports an earlier augsplit left join the list too
        write_text_atomic(folder / REPORTS_LIST, json.dumps({"files": sorted(listed | set(names))}, indent=1))
    return folder


def _earlier_reports(folder: Path) -> set[str]:
    """The reports an augsplit from before the list wrote in `folder`, known by their JSON: an
    audit.json of augsplit's audit schema (with its audit.html), a score.json with score's
    keys (with report.html and the CSV tables beside it). Nothing else is taken for ours."""
    found: set[str] = set()
    doc = _json(folder / "audit.json")
    if isinstance(doc, dict) and str(doc.get("schema", "")).startswith("augsplit.audit/"):
        found |= {"audit.json", "audit.html"}
    doc = _json(folder / "score.json")
    if isinstance(doc, dict) and ({"train_split", "reference_split", "n_scored"} <= set(doc)
                                  or {"models", "comparison"} <= set(doc)):
        found |= {"score.json", "report.html"} | {f.name for f in folder.glob("*.csv") if f.is_file()}
    return found


def _json(f: Path):
    try:
        if f.is_symlink() or not f.is_file() or f.stat().st_size > 64 << 20:
            return None
        return json.loads(f.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _listed(folder: Path) -> set[str]:
    """The report files augsplit wrote in `folder` (its list; none when it has no list)."""
    f = folder / REPORTS_LIST
    if not os.path.lexists(f):
        return set()
    try:
        if f.is_symlink() or not f.is_file():
            raise ValueError
        return {str(n) for n in json.loads(f.read_text(encoding="utf-8"))["files"] if "/" not in str(n)}
    except (OSError, ValueError, KeyError, TypeError):
        raise DatasetError("unreadable list of the reports augsplit wrote here; give another --out",
                           where=str(f)) from None
