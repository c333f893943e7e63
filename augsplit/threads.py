"""OpenCV's thread count: changed only for the length of a call and then put back, or for the
whole life of a loader's worker process; and made safe across fork.

cv2.setNumThreads is process-wide: a library call that lowers it must restore what the
caller had. Everything in augsplit that changes it goes through here.

Fork: a child forked while OpenCV's pool has threads inherits a pool whose threads do not
exist in it, and its first `cv2.setNumThreads` waits for them forever (measured: a forked
DataLoader worker hung). So, once this module is imported, every fork parks the parent's pool
at one thread just before and puts the count back on both sides just after: the child starts
with a pool of its own. Nothing changes for the caller but the cost of a pool restart per fork.
"""

from __future__ import annotations

import functools
import os
import sys
from contextlib import contextmanager

_parked: list[int] = []


def _park_before_fork() -> None:
    cv2 = sys.modules.get("cv2")
    if cv2 is not None and (n := cv2.getNumThreads()) != 1:
        cv2.setNumThreads(1)
        _parked.append(n)


def _unpark_after_fork() -> None:
    if _parked:
        sys.modules["cv2"].setNumThreads(_parked.pop())


os.register_at_fork(before=_park_before_fork, after_in_parent=_unpark_after_fork,
                    after_in_child=_unpark_after_fork)


def limit_opencv(n: int):
    """Set OpenCV's thread count to `n`; return the function that restores the previous one."""
    import cv2

    before = cv2.getNumThreads()
    cv2.setNumThreads(int(n))
    return lambda: cv2.setNumThreads(before)


@contextmanager
def opencv_threads(n: int):
    """`with opencv_threads(1): ...` runs the block with n OpenCV threads, then restores."""
    restore = limit_opencv(n)
    try:
        yield
    finally:
        restore()


def one_opencv_thread(fn):
    """Decorator for a command: `fn` runs with one OpenCV thread, the caller's count restored
    after. Per-image work is small: OpenCV's pool gains no wall time on it but spins every core
    (measured in generate)."""

    @functools.wraps(fn)
    def wrapped(*args, **kwargs):
        with opencv_threads(1):
            return fn(*args, **kwargs)

    return wrapped


_worker_checked: int | None = None  # the pid this process last decided for


def _one_thread_if_worker() -> None:
    global _worker_checked
    pid = os.getpid()
    if _worker_checked == pid:
        return
    _worker_checked = pid
    import multiprocessing

    if multiprocessing.parent_process() is not None:
        limit_opencv(1)  # for the worker's life, as torch does with its own threads there


def one_opencv_thread_in_workers(fn):
    """Decorator for a loader's per-item method: in a worker process (one that multiprocessing
    started, such as a DataLoader worker) OpenCV runs on one thread for the process's life,
    the loader's workers being the parallelism already; in the caller's own process the count
    is the caller's and is not touched (switching it per item costs about 20 us, measured)."""

    @functools.wraps(fn)
    def wrapped(*args, **kwargs):
        _one_thread_if_worker()
        return fn(*args, **kwargs)

    return wrapped
