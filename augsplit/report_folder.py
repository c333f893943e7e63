"""The folders audit, score and preview write their reports to, and what augsplit may replace
and remove there.

A report folder is either one of a dataset's own report folders (`<dataset>/audit`, `score`,
`preview`: augsplit's, like the rest of the dataset) or a folder outside every dataset. In the
second, a report file replaces only a file augsplit wrote there before, as the folder's hidden
list (REPORTS_LIST) records; a file of the same name that the user made, or that is one of the
command's own inputs, is refused by name and left as it is. Anywhere else inside a dataset (its
images, its manifest) a report would become a stray file the dataset's checks refuse.

A folder holds one run's report per command: when a run has written all its files
(`report_set`), the files the same command wrote there before and this run did not (score's
comparison tables after a score of one model, the contact sheets of another dataset's splits)
are removed, so no table of an earlier run stands beside the new ones as if it were
theirs. Only regular files the list names for that command go, never a command's input, a
link, a folder or a file augsplit has no record of writing.
"""

from __future__ import annotations

import json
import os
import stat
from contextlib import contextmanager
from pathlib import Path

from .dataset import layout as lay
from .errors import DatasetError
from .io import check_folder_target, ensure_folder, write_text_atomic

# {"files": [names augsplit wrote in this folder], "runs": {command: [names its last run may have left]}}
REPORTS_LIST = ".augsplit-reports.json"


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


@contextmanager
def report_set(out, command: str, names, inputs=()):
    """The folder to write one run of `command`'s report files `names` in: `out`, made if
    missing (its parent must exist), once `check_report_folder` allows them there. The names
    are recorded in the folder's list before anything is written, so a run cut short leaves
    only files a later run may replace and remove. When the block completes, the files
    `command` left there before and this run did not write are removed (see the module
    docstring); when it raises, nothing is removed."""
    names = set(names)
    p, _own, listed = check_report_folder(out, sorted(names), inputs)
    folder = ensure_folder(p)
    files, runs = _read_list(folder)
    earlier = runs.get(command, set())
    if not names <= files or not names <= earlier or not listed <= files:  # reports an earlier augsplit left join too
        _write_list(folder, files | listed | names, {**runs, command: earlier | names})
    yield folder
    gone = {n for n in sorted(earlier - names) if _remove_stale(folder / n, inputs)}
    files, runs = _read_list(folder)
    left = (earlier | names) - gone  # a stale name that could not go stays this command's
    if gone or runs.get(command) != left:
        _write_list(folder, files - gone, {**runs, command: left})


def _remove_stale(q: Path, inputs) -> bool:
    """Remove the stale report `q` if it is a regular file and none of the command's inputs;
    whether it is gone. A link is never followed, a folder never entered."""
    try:
        st = os.lstat(q)
    except FileNotFoundError:
        return True
    except OSError:
        return False
    if not stat.S_ISREG(st.st_mode) or any(os.path.lexists(src) and _same_or_inside(q, src) for src in inputs):
        return False
    try:
        os.unlink(q)  # unlink never follows a link: were q swapped for one, the link alone would go
    except FileNotFoundError:
        return True
    except OSError:
        return False
    return True


def _same_or_inside(q: Path, src) -> bool:
    """Whether `q` is the input `src` or lies in it (a dataset's own report folders excepted:
    augsplit's, as `check_report_folder` lets reports go there)."""
    real, source = os.path.realpath(q), os.path.realpath(src)
    return real == source or (os.path.isdir(source) and not lay.is_dataset(source)
                              and real.startswith(source.rstrip(os.sep) + os.sep))


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
    return _read_list(folder)[0]


def _read_list(folder: Path) -> tuple[set[str], dict[str, set[str]]]:
    """(the files augsplit wrote in `folder`, the names each command's last run may have left
    there) from its list; empty when it has none (a list from before the runs were recorded
    has no runs: nothing of it is ever removed)."""
    f = folder / REPORTS_LIST
    if not os.path.lexists(f):
        return set(), {}
    try:
        if f.is_symlink() or not f.is_file():
            raise ValueError
        doc = json.loads(f.read_text(encoding="utf-8"))
        files = {str(n) for n in doc["files"] if _plain_name(str(n))}
        runs = {str(c): {str(n) for n in names if _plain_name(str(n))} for c, names in doc.get("runs", {}).items()}
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        raise DatasetError("unreadable list of the reports augsplit wrote here; give another --out",
                           where=str(f)) from None
    return files, runs


def _plain_name(name: str) -> bool:
    """A name of a file in the folder itself (never a path, never the list itself)."""
    return bool(name) and "/" not in name and "\\" not in name and name not in (".", "..", REPORTS_LIST)


def _write_list(folder: Path, files: set[str], runs: dict[str, set[str]]) -> None:
    doc = {"files": sorted(files), "runs": {c: sorted(n) for c, n in sorted(runs.items())}}
    write_text_atomic(folder / REPORTS_LIST, json.dumps(doc, indent=1))
