"""An epoch number that worker processes see change: the loaders' and transforms' `set_epoch`.

`SharedEpoch` keeps the number in shared memory (multiprocessing.RawValue), so a process
started while it exists — forked, or spawned with the object among its arguments, as torch's
DataLoader starts its workers, persistent or not — reads what the parent sets later. Pickled
for anything else (saved, deep-copied) it travels as a plain number, and the copy is its own.
"""

from __future__ import annotations

from multiprocessing import context, sharedctypes

from .errors import DatasetError


def _number(value, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) and not hasattr(value, "__index__"):
        raise DatasetError(f"the epoch is a non-negative integer, got {value!r}", where=where)
    n = int(value.__index__())
    if n < 0:
        raise DatasetError(f"the epoch is a non-negative integer, got {n}", where=where)
    return n


class SharedEpoch:
    """A non-negative integer in shared memory (see the module docstring)."""

    __slots__ = ("_mem",)

    def __init__(self, value: int = 0, where: str = "epoch"):
        self._mem = sharedctypes.RawValue("q", _number(value, where))

    @property
    def value(self) -> int:
        return int(self._mem.value)

    def set(self, value: int, where: str = "set_epoch") -> None:
        self._mem.value = _number(value, where)  # one aligned 8-byte store: readers never see half of it

    def __getstate__(self):
        if context.get_spawning_popen() is not None:
            return {"shared": self._mem}  # multiprocessing hands the same memory to the new process
        return {"value": self.value}

    def __setstate__(self, state) -> None:
        self._mem = state["shared"] if "shared" in state else sharedctypes.RawValue("q", state["value"])

    def __repr__(self) -> str:
        return f"SharedEpoch({self.value})"
