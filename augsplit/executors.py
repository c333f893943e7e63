"""Executors: run independent shard tasks serially, on local processes, or on dask.distributed.

A task is a picklable module-level callable applied to one job; it returns a small result.
Workers build their own state (the initializer, or a cache inside the task), so nothing that
holds a file handle or a random stream is shared across processes. Results come back as they
finish; the caller decides what counts as committed. A worker that dies loses only the job it
was running, which is run again (dask does this itself; the process pool is restarted).
"""

from __future__ import annotations

import logging
import multiprocessing as mp
import os
import signal
import threading
import uuid
from collections import deque
from contextlib import contextmanager, suppress
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from queue import SimpleQueue
from typing import Callable, Iterable, Iterator

from .errors import DatasetError

EXECUTORS = ("auto", "serial", "processes", "dask")
MAX_POOL_RESTARTS = 3  # a job that kills its worker this often is a bug, not bad luck
CONNECT_TIMEOUT_S = 5.0  # an unreachable scheduler is reported in seconds, not a hang


def check_options(workers, executor: str) -> None:
    """Bad executor options named in one line, before anything is read."""
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise DatasetError(f"workers must be at least 1, got {workers!r}", where="--workers")
    if executor not in EXECUTORS:
        raise DatasetError(f"unknown executor '{executor}'; use one of {', '.join(EXECUTORS)}", where="--executor")


# ---- what a run's tasks share ------------------------------------------------------------------
# While a run lasts, its driver keeps here what the tasks need (an opened dataset, a built
# spec), by key: a worker forked from the driver finds it and does not make it again (planning
# a large canvas takes seconds). A fresh process (spawned, a dask worker) makes its own, once,
# and runs on one OpenCV thread, as every augsplit worker does.
_SHARED: dict = {}


@contextmanager
def sharing(key, value):
    """`with sharing(key, value):` run tasks that call `shared(key, ...)`."""
    _SHARED[key] = value
    try:
        yield value
    finally:
        _SHARED.pop(key, None)


def shared(key, make: Callable):
    """The run's value for `key`: the driver's (also in a worker forked from it) or, in a
    fresh process, `make()`'s, made once."""
    value = _SHARED.get(key)
    if value is None:
        from .threads import limit_opencv

        limit_opencv(1)
        value = _SHARED[key] = make()
    return value


def run_serial(task: Callable, jobs: Iterable, init: Callable | None = None, initargs: tuple = ()) -> Iterator:
    if init is not None:
        init(*initargs)
    for job in jobs:
        yield job, task(job)


def run_serial_overlapped(task: Callable, jobs: Iterable) -> Iterator:
    """Serial, for a task that leaves its job done but for a last wait on the disk: it returns
    a pending job, whose `finish()` completes it (e.g. syncs and commits what it wrote) and
    returns its result, and whose `abandon()` undoes it. Each finish runs on a thread of its
    own while the next job's task runs (`finish_overlapped`)."""
    return finish_overlapped((job, task(job)) for job in jobs)


def finish_overlapped(made: Iterable, depth: int = 1) -> Iterator:
    """(job, pending) pairs as `made` gives them (a serial task's, or a pool's results) ->
    (job, result): each pending's `finish()` runs on a thread of its own while the next pairs
    are made, at most `depth` at once; results come in the order made, each once finished.

    On a failure, a Ctrl-C or the caller stopping, every finish under way is waited for (a
    commit lands whole or not at all) and a pending not yet finishing is abandoned. Then `made`
    stops: on a failure it is told so (`_Stopped` thrown in: a pool lets its running jobs end
    and hands their results to its `lost`), otherwise it is closed (a pool stops at once)."""
    made = iter(made)
    finishing: deque = deque()  # (job, _Finishing), oldest first
    failed = False
    try:
        while True:
            pending, started, done = None, False, []
            try:
                job, pending = next(made, _END)  # one line: a Ctrl-C lands before it or after both are set
                if pending is None:
                    break
                while len(finishing) >= depth:
                    done.append((finishing[0][0], finishing[0][1].result()))
                    finishing.popleft()  # only once finished: the `finally` below waits for the rest
                with _ctrl_c_held():  # a thread half-started would hold the exit forever
                    finishing.append((job, _Finishing(pending.finish)))
                    started = True
            except BaseException:
                if pending is not None and not started:
                    pending.abandon()
                raise
            yield from done
        while finishing:
            done = finishing[0][0], finishing[0][1].result()
            finishing.popleft()
            yield done
    except Exception:
        failed = True
        raise
    finally:
        for _job, f in finishing:
            f.wait()
        if failed and hasattr(made, "throw"):
            with suppress(_Stopped):
                made.throw(_Stopped())
        elif hasattr(made, "close"):
            made.close()


class _Stopped(Exception):
    """Thrown into the source of a `finish_overlapped` that failed: stop, as after a failed job."""


_END = (None, None)  # what `finish_overlapped` takes from `made` once it has ended (a pending is never None)


class _Finishing:
    """`fn()` running on a thread of its own; `result()` waits for it and returns or raises
    what it did.

    The wait holds Ctrl-C until the thread has ended: a finish is waited for in any case (a
    commit lands whole), and a Ctrl-C landing inside `Thread.join`'s own bookkeeping can
    leave the threading module's shutdown lock held (found by tests/ctrl_c_anywhere.py), after
    which no thread can start or end and the interpreter's exit waits forever."""

    def __init__(self, fn: Callable):
        self._fn, self._value, self._error = fn, None, None
        self.thread = threading.Thread(target=self._run, name="augsplit-finish")
        self.thread.start()

    def _run(self) -> None:
        try:
            self._value = self._fn()
        except BaseException as exc:  # noqa: BLE001 - handed to result()
            self._error = exc

    def wait(self) -> None:
        with _ctrl_c_held():
            self.thread.join()

    def result(self):
        self.wait()
        if self._error is not None:
            raise self._error
        return self._value


# ---- local processes --------------------------------------------------------------------------


def _pool_init(init: Callable | None, initargs: tuple) -> None:
    # Ctrl-C reaches the whole process group: only the parent handles it (and stops the
    # workers), so a worker never dies half-way through writing with a traceback of its own.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _die_with_parent()
    if init is not None:
        init(*initargs)


def _die_with_parent() -> None:
    """Linux: have the kernel end this worker when its parent dies (e.g. on SIGKILL), so no
    orphan keeps writing into a folder that a resumed run is already working on."""
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        PR_SET_PDEATHSIG = 1
        libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
        if os.getppid() == 1:  # the parent already died before prctl took effect
            os._exit(1)
    except (OSError, AttributeError):
        pass


@contextmanager
def _ctrl_c_held():
    """Hold a Ctrl-C that arrives inside the block until the block has ended, then deliver it.

    Around the pool's own bookkeeping (starting its processes and thread, queueing a job,
    stopping it): a KeyboardInterrupt raised in the middle of that standard-library code can
    leave a lock held or a worker unregistered, and the interpreter's exit then waits for them
    forever. Ctrl-C lands, as before, wherever the driver waits for a result or runs its
    caller's code. Signals reach only the main thread; elsewhere this does nothing."""
    before = signal.getsignal(signal.SIGINT)
    if threading.current_thread() is not threading.main_thread() or before is None:  # None: set outside Python
        yield
        return
    held: list = []
    signal.signal(signal.SIGINT, lambda signum, frame: held.append(signum))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, before)
        if held:
            signal.raise_signal(signal.SIGINT)  # to whatever handled it before


def _stop_pool(pool: ProcessPoolExecutor) -> None:
    """Cancel queued jobs and end running ones now: their shards are not committed and are
    redone on resume, so there is nothing to wait for. A second Ctrl-C waits for this."""
    with _ctrl_c_held():
        procs = list((getattr(pool, "_processes", None) or {}).values())  # no public handle on the workers
        pool.shutdown(wait=False, cancel_futures=True)
        for p in procs:
            if p.is_alive():
                p.terminate()
        for p in procs:
            p.join(timeout=5)


def run_processes(task: Callable, jobs: Iterable, workers: int, init: Callable | None = None,
                  initargs: tuple = (), max_restarts: int = MAX_POOL_RESTARTS,
                  lost: Callable | None = None) -> Iterator:
    """Yield (job, result) as workers finish; at most 2 x workers jobs are in flight.

    If a worker process dies (killed, out of memory), the jobs in flight are put back and a
    new pool takes over; after `max_restarts` deaths the run stops with a DatasetError.
    `lost(result)` is called for each result that nobody will take: of a job redone after a
    death, or that ended after the run stopped on a failure (a job's, or the caller's thrown
    in), so a result that holds something (a written, uncommitted shard) can let it go.

    Ctrl-C stops the pool at once, wherever it lands. The driver waits on a queue of its own
    that each job's future is put on when it finishes, not on `concurrent.futures.wait`: that
    takes every pending future's lock in a Python loop, and a Ctrl-C landing inside that loop
    left a lock held that the pool's thread then waited for forever, so the interrupted run
    never exited. The pool's bookkeeping runs with Ctrl-C held (`_ctrl_c_held`)."""
    queue = list(jobs)[::-1]  # pop() from the end keeps the given order
    ctx = mp.get_context("spawn" if mp.get_start_method(allow_none=True) == "spawn" else "fork")
    deaths = 0
    while queue:
        with _ctrl_c_held():
            pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_pool_init,
                                       initargs=(init, initargs))
        pending: dict = {}
        finished: SimpleQueue = SimpleQueue()  # this pool's futures, as they finish
        try:
            while queue or pending:
                with _ctrl_c_held():  # the first submit starts the pool's processes and thread
                    while queue and len(pending) < 2 * workers:
                        fut = pool.submit(task, queue[-1])  # raises at once if the pool broke: keep the job
                        pending[fut] = queue.pop()
                        fut.add_done_callback(finished.put)
                fut = finished.get()
                job = pending[fut]
                result = fut.result()  # BrokenProcessPool leaves the job in `pending`, to be redone
                del pending[fut]
                yield job, result
            with _ctrl_c_held():
                pool.shutdown(wait=True)  # every job is done: the workers only have to exit
        except BrokenProcessPool:
            deaths += 1
            redo = list(pending.values())
            _stop_pool(pool)
            _let_go(pending, lost)
            if deaths > max_restarts:
                raise DatasetError(f"worker processes died {deaths} times; the last time while making "
                                   f"{', '.join(map(str, redo[:3]))}") from None
            # every job in flight may have been the one running in the dead worker: redo them all
            queue.extend(reversed(redo))
            continue
        except Exception:
            # a job failed (e.g. disk full): let the running ones finish or fail cleanly, so
            # no half-made shard is left behind, but start nothing new
            try:
                with _ctrl_c_held():
                    pool.shutdown(wait=False, cancel_futures=True)
                running = {f for f in pending if not f.done()}
                while running:
                    running.discard(finished.get())
                with _ctrl_c_held():
                    pool.shutdown(wait=True)
                _let_go(pending, lost)
            except BaseException:  # Ctrl-C while they finish
                _stop_pool(pool)
                raise
            raise
        except BaseException:  # Ctrl-C, or the caller stopped listening: stop now
            _stop_pool(pool)
            raise


def _let_go(futures, lost: Callable | None) -> None:
    """`lost(result)` for each of the futures that ended with a result."""
    for fut in futures if lost is not None else ():
        if fut.done() and not fut.cancelled() and fut.exception() is None:
            lost(fut.result())


# ---- dask.distributed -------------------------------------------------------------------------

_DASK_STATE: dict = {}
_DASK_LOCK = threading.Lock()


def _dask_call(job, task: Callable, init: Callable | None, initargs: tuple, token: str):
    """Runs on a dask worker: the initializer once per worker process and run, then the task."""
    if init is not None:
        with _DASK_LOCK:
            if _DASK_STATE.get("token") != token:
                init(*initargs)
                _DASK_STATE["token"] = token
    return task(job)


def dask_client(scheduler: str | None, workers: int, timeout: float | None = None):
    """A distributed.Client on `scheduler`, or on a new LocalCluster of `workers` processes.
    Returns (client, cluster or None). Import errors and unreachable schedulers become one line."""
    timeout = CONNECT_TIMEOUT_S if timeout is None else timeout
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise DatasetError("the dask executor needs dask.distributed: pip install 'augsplit[dask]'") from None
    if scheduler:
        # built in two steps so a failed client can be closed at once; left to its finaliser it
        # would stall the exit for another ten seconds trying to say goodbye to nobody
        client = Client.__new__(Client)
        try:
            client.__init__(scheduler, timeout=timeout, set_as_default=False)
            return client, None
        except Exception as exc:  # noqa: BLE001 - OSError, TimeoutError, ValueError for a bad address ...
            try:
                client.close(timeout=1)
            except Exception:  # noqa: BLE001 - nothing to close is fine
                pass
            if isinstance(exc, (OSError, TimeoutError, ValueError)):
                detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            else:  # e.g. a MemoryError decoding the reply of something that is not a scheduler
                detail = f"the peer does not answer as a dask scheduler: {type(exc).__name__}"
            raise DatasetError(f"cannot connect to a dask scheduler within {timeout:g} s ({detail})",
                               where=scheduler) from None
    # one thread per worker: the work is CPU-bound Python + OpenCV, so processes give the parallelism
    cluster = LocalCluster(n_workers=max(1, workers), threads_per_worker=1, processes=True,
                           dashboard_address=":0", silence_logs=logging.CRITICAL)
    return Client(cluster, set_as_default=False), cluster


def close_dask(client, cluster) -> None:
    client.close()
    if cluster is not None:
        cluster.close()


def run_dask(task: Callable, jobs: Iterable, workers: int = 2, scheduler: str | None = None,
             init: Callable | None = None, initargs: tuple = (), timeout: float | None = None,
             client=None) -> Iterator:
    """Yield (job, result) as dask tasks finish. One task per job; dask reruns the task of a
    worker that is lost. The workers must see the same file system paths as this process.
    With `client` given, it is used and left open; otherwise one is made (see dask_client)."""
    jobs = list(jobs)
    own = client is None
    cluster = None
    if own:
        client, cluster = dask_client(scheduler, workers, timeout)
    try:
        from distributed import as_completed
        from distributed.scheduler import KilledWorker

        token = uuid.uuid4().hex[:12]  # unique task keys: two runs on one scheduler never share results
        futures = {client.submit(_dask_call, job, task=task, init=init, initargs=initargs, token=token,
                                 key=f"augsplit-{token}-{i}", pure=False): job for i, job in enumerate(jobs)}
        try:
            for fut in as_completed(list(futures), loop=client.loop):
                job = futures[fut]
                try:
                    result = fut.result()
                except KilledWorker:
                    raise DatasetError(f"dask workers kept dying while running {job}") from None
                yield job, result
        except BaseException:
            client.cancel(list(futures))
            raise
    finally:
        if own:
            close_dask(client, cluster)


class _NoBar:
    def update(self, n):
        pass

    def close(self):
        pass


def progress(total: int, enabled: bool, desc: str, initial: int = 0):
    """A tqdm bar on stderr counting images as tasks finish, only on a terminal (else a no-op)."""
    import sys

    if not enabled or not sys.stderr.isatty():
        return _NoBar()
    from .progress import bar  # tqdm.auto: a widget in a notebook, text in a terminal

    return bar(total=total, initial=initial, unit="img", desc=desc)


def run(task: Callable, jobs: list, workers: int = 1, init: Callable | None = None, initargs: tuple = (),
        executor: str = "auto", scheduler: str | None = None, client=None) -> Iterator:
    """Dispatch: 'auto' is serial for one worker (or one job) and local processes otherwise."""
    if executor not in EXECUTORS:
        raise DatasetError(f"unknown executor '{executor}'; use one of {', '.join(EXECUTORS)}")
    if executor == "dask" or scheduler or client is not None:
        return run_dask(task, jobs, workers, scheduler, init, initargs, client=client)
    if executor == "serial" or (executor == "auto" and (workers <= 1 or len(jobs) <= 1)):
        return run_serial(task, jobs, init, initargs)
    return run_processes(task, jobs, max(1, workers), init, initargs)
