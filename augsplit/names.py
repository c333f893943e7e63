"""The one safe-name rule for every name that becomes (or comes from) a path.

A split name becomes `images/<split>/`, `manifest/split=<split>/` and the image ids
`<split>-<index:07d>`; sprite-folder class and instance names are folder and file names.
Class names themselves never become paths (image ids and partitions use split names and
indices only), so text glyphs such as "?" or "1/2" remain valid classes.
"""

from __future__ import annotations

import re

from .errors import AugsplitError, SpecError
from .limits import MAX_NAME_LENGTH

_SAFE = re.compile(r"[A-Za-z0-9_.\-]+")
RULE = (f"ASCII letters (a-z, A-Z), digits, '_', '-' and '.', not starting with '.', at most {MAX_NAME_LENGTH} "
        "characters")


def name_problem(name) -> str | None:
    """Why `name` breaks the rule, or None if it obeys it."""
    if not isinstance(name, str):
        return f"a name is text, not {type(name).__name__}"
    if not name:
        return "a name cannot be empty"
    if len(name) > MAX_NAME_LENGTH:
        return f"the name is {len(name)} characters long; at most {MAX_NAME_LENGTH} are allowed"
    if not _SAFE.fullmatch(name):
        bad = sorted({c for c in name if not _SAFE.fullmatch(c)})
        return f"name {name!r} has the character(s) {' '.join(repr(c) for c in bad)}"
    if name.startswith("."):
        return f"name {name!r} starts with '.'"
    return None


def check_name(name, where: str, error: type[AugsplitError] = SpecError) -> str:
    """`name` if it obeys the rule; else `error` (SpecError by default) naming `where`."""
    problem = name_problem(name)
    if problem is not None:
        raise error(f"{problem}; names may use {RULE}", where=where)
    return name


def shown(name) -> str:
    """`name` as it may appear in a one-line message or key path: quoted if it is not printable."""
    return name if isinstance(name, str) and name.isprintable() else repr(name)


def check_distinct_casefold(names, where: str, error: type[AugsplitError] = SpecError) -> None:
    """Names that differ only in case would share one folder on case-insensitive file systems."""
    seen: dict[str, str] = {}
    for n in names:
        other = seen.setdefault(n.casefold(), n)
        if other != n:
            raise error(f"names {other!r} and {n!r} differ only in case; they would share a folder on "
                        "macOS and Windows", where=where)
