"""Executors: run independent shard tasks serially or on local processes.

A task is a picklable callable applied to one job; it returns a small result. Workers build
their own state once (the initializer), so nothing that holds a file handle or a random
stream is shared across a fork. Results come back as they finish; the caller commits them.
"""

from __future__ import annotations

import multiprocessing as mp
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from typing import Callable, Iterable, Iterator


def run_serial(task: Callable, jobs: Iterable, init: Callable | None = None, initargs: tuple = ()) -> Iterator:
    if init is not None:
        init(*initargs)
    for job in jobs:
        yield job, task(job)


def run_processes(task: Callable, jobs: Iterable, workers: int, init: Callable | None = None,
                  initargs: tuple = ()) -> Iterator:
    """Yield (job, result) as workers finish; at most 2 x workers jobs are in flight."""
    jobs = iter(jobs)
    ctx = mp.get_context("spawn" if mp.get_start_method(allow_none=True) == "spawn" else "fork")
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=init, initargs=initargs) as pool:
        pending = {}
        try:
            for job in jobs:
                pending[pool.submit(task, job)] = job
                if len(pending) >= 2 * workers:
                    break
            while pending:
                done, _ = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    job = pending.pop(fut)
                    yield job, fut.result()
                    nxt = next(jobs, None)
                    if nxt is not None:
                        pending[pool.submit(task, nxt)] = nxt
        except BaseException:
            for fut in pending:
                fut.cancel()
            pool.shutdown(wait=False, cancel_futures=True)
            raise


def run(task: Callable, jobs: list, workers: int = 1, init: Callable | None = None, initargs: tuple = ()) -> Iterator:
    if workers <= 1 or len(jobs) <= 1:
        return run_serial(task, jobs, init, initargs)
    return run_processes(task, jobs, workers, init, initargs)
