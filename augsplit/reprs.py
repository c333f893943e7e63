"""Short reprs that show how an object was made, as scikit-learn's estimators do: the class
name, then the arguments of its constructor that differ from their defaults, each value cut
so the whole stays under MAX_CHARS and on one line."""

from __future__ import annotations

import inspect
from pathlib import PurePath

MAX_CHARS = 300


class Shown(str):
    """A value shown as written (e.g. ``<spec 1a2b...>``), not through repr()."""

    def __repr__(self) -> str:
        return str(self)


def _value(v, width: int) -> str:
    if isinstance(v, PurePath):
        v = str(v)
    text = repr(v)
    if len(text) <= width and "\n" not in text:
        return text
    if isinstance(v, str):  # keep a path's end, where its name is
        return repr("..." + v[-max(width - 5, 8):])
    return f"{type(v).__name__}(...)"


def _defaults(cls) -> dict:
    try:
        params = inspect.signature(cls.__init__).parameters
    except (TypeError, ValueError):
        return {}
    return {n: p.default for n, p in params.items() if p.default is not inspect.Parameter.empty}


def _is_default(v, default) -> bool:
    try:
        return bool(v == default) and type(v) is type(default)
    except Exception:  # noqa: BLE001 - arrays and odd objects: shown, never compared
        return False


def made_repr(obj, args: dict, positional: tuple[str, ...] = ()) -> str:
    """``Name(pos, ..., key=value, ...)`` of `obj` from its constructor arguments `args`: the
    `positional` ones by value, the others only where they differ from the default."""
    defaults = _defaults(type(obj))
    items = [(None if n in positional else n, v) for n, v in args.items()
             if n in positional or n not in defaults or not _is_default(v, defaults[n])]
    name = type(obj).__name__
    for width in (MAX_CHARS, 120, 60, 30, 12):
        parts = [_value(v, width) if k is None else f"{k}={_value(v, width)}" for k, v in items]
        text = f"{name}({', '.join(parts)})"
        if len(text) < MAX_CHARS:
            return text
    return text[:MAX_CHARS - 5] + "...)"
