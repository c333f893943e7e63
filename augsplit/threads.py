"""OpenCV's thread count, changed only for the length of a call and then put back.

cv2.setNumThreads is process-wide: a library call that lowers it must restore what the
caller had. Everything in augsplit that changes it goes through here.
"""

from __future__ import annotations

import functools
from contextlib import contextmanager


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
    """Decorator: `fn` runs with one OpenCV thread, the caller's count restored after. Per-image
    work is small: OpenCV's pool gains no wall time on it but spins every core (measured in
    generate), and a loader's workers are the parallelism already."""

    @functools.wraps(fn)
    def wrapped(*args, **kwargs):
        with opencv_threads(1):
            return fn(*args, **kwargs)

    return wrapped
