"""Run by test_interrupt in a process of its own: a Ctrl-C at every line the driver's main thread
runs in an executor and in the standard library's pool, queue and thread code.

    python tests/ctrl_c_anywhere.py processes|overlapped|pool-overlapped

Trial n raises SIGINT in this process when the main thread reaches the n-th such line of a
small run, so Python handles it where a real Ctrl-C landing at that moment would be handled.
`processes`: 4 jobs on 2 local worker processes (the pool's start, its waits, results, its
end); the run must stop clean: within 5 s no thread of the pool is alive and no worker
process is left, which is what lets the interpreter exit. `overlapped`: 4 jobs of the serial
executor that finishes each job on a thread while the next one runs
(`executors.run_serial_overlapped`); within 5 s no finishing thread is alive, every finish
that began has ended (a commit lands whole), and every job made was finished or abandoned
(nothing left half-made). `pool-overlapped`: both at once, as generate runs local workers: 4 jobs
on 2 worker processes whose results the driver finishes on threads
(`executors.finish_overlapped` of `run_processes`); the checks of both modes, and every result
the driver received, or the pool handed to its `lost`, was finished or abandoned. Prints one JSON line; a trial that hangs for 20 s ends the process
with a traceback of every thread (non-zero exit)."""

from __future__ import annotations

import faulthandler
import json
import multiprocessing as mp
import os
import signal
import sys
import threading
import time
import traceback

from augsplit import executors

WATCHED = ("augsplit/executors.py", "concurrent/futures/", "/threading.py", "/queue.py")
JOBS = 4
PARENT = os.getpid()
SEEN: set = set()  # pool threads already looked at by an earlier trial
BAD_ENOUGH = 3  # stop after this many failed trials: each costs seconds
MODE = "processes"  # or "overlapped" (argv[1])


def task(x: int) -> int:
    time.sleep(0.002)
    return x


class Pending:
    """A job made but not finished, logging what becomes of it."""

    def __init__(self, job: int, log: dict):
        self.job, self.log = job, log
        log["made"].add(job)

    def finish(self) -> int:
        self.log["began"].add(self.job)
        time.sleep(0.002)
        self.log["ended"].add(self.job)
        return self.job

    def abandon(self) -> None:
        self.log["abandoned"].add(self.job)


def run_overlapped() -> dict:
    log: dict = {"made": set(), "began": set(), "ended": set(), "abandoned": set()}

    def make(job: int) -> Pending:
        time.sleep(0.002)
        return Pending(job, log)

    try:
        for _ in executors.run_serial_overlapped(make, range(JOBS)):
            pass
    finally:
        RUNS.append(log)
    return log


class Received:
    """A worker's result, picklable: a job done but for its finish, logging in the driver."""

    def __init__(self, job: int):
        self.job = job

    def finish(self) -> int:
        LOG["began"].add(self.job)
        time.sleep(0.002)
        LOG["ended"].add(self.job)
        return self.job

    def abandon(self) -> None:
        LOG["abandoned"].add(self.job)


LOG: dict = {}


def pool_task(x: int) -> Received:
    time.sleep(0.002)
    return Received(x)


def run_pool_overlapped() -> dict:
    LOG.clear()
    LOG.update(made=set(), began=set(), ended=set(), abandoned=set())

    def received(pairs):
        for job, r in pairs:
            LOG["made"].add(job)
            yield job, r

    try:
        results = executors.run_processes(pool_task, range(JOBS), 2, lost=Received.abandon)
        for _ in executors.finish_overlapped(received(results), depth=2):
            pass
    finally:
        RUNS.append(LOG)
    return LOG


RUNS: list = []


def overlapped_left(where: str) -> list[str]:
    """What an overlapped run left: a finishing thread alive, a finish cut short, a job made
    and neither finished nor abandoned."""
    t0 = time.monotonic()
    left = []
    for t in threading.enumerate():
        if t.name == "augsplit-finish" and t not in SEEN:
            SEEN.add(t)
            t.join(timeout=max(0.0, 5 - (time.monotonic() - t0)))
            if t.is_alive():
                left.append(f"a finishing thread (Ctrl-C at {where})")
    log = RUNS.pop()
    if log["began"] - log["ended"]:
        left.append(f"finish of job(s) {sorted(log['began'] - log['ended'])} cut short (Ctrl-C at {where})")
    if log["made"] - log["began"] - log["abandoned"]:
        left.append(f"job(s) {sorted(log['made'] - log['began'] - log['abandoned'])} neither finished nor "
                    f"abandoned (Ctrl-C at {where})")
    return left


def trial(at: int | None) -> tuple[int, bool, list[str]]:
    """(lines the main thread ran, whether the run stopped by Ctrl-C, what was left alive)."""
    count = 0
    where = ""

    def tracer(frame, event, arg):
        nonlocal count, where
        if os.getpid() != PARENT:  # a forked worker inherits the tracer: not its business
            sys.settrace(None)
            return None
        if event == "line" and any(w in frame.f_code.co_filename for w in WATCHED):
            count += 1
            if count == at:
                where = f"{os.path.basename(frame.f_code.co_filename)}:{frame.f_lineno} {frame.f_code.co_name}"
                signal.raise_signal(signal.SIGINT)
        return tracer

    stopped = False
    sys.settrace(tracer)
    try:
        if MODE == "overlapped":
            run_overlapped()
        elif MODE == "pool-overlapped":
            run_pool_overlapped()
        else:
            for _ in executors.run_processes(task, range(JOBS), 2):
                pass
    except KeyboardInterrupt:
        stopped = True
    finally:
        sys.settrace(None)
    if MODE == "overlapped":
        return count, stopped, overlapped_left(where)
    t0 = time.monotonic()
    left = overlapped_left(where) if MODE == "pool-overlapped" else []
    for t in threading.enumerate():
        if type(t).__name__ == "_ExecutorManagerThread" and t.ident is not None and t not in SEEN:
            SEEN.add(t)
            t.join(timeout=max(0.0, 5 - (time.monotonic() - t0)))
            if t.is_alive():
                stack = traceback.extract_stack(sys._current_frames().get(t.ident))
                left.append(f"a pool thread (Ctrl-C at {where}) waits in "
                            + " < ".join(f"{f.name}:{f.lineno}" for f in stack[::-1][:3]))
    while mp.active_children() and time.monotonic() - t0 < 5:
        time.sleep(0.01)
    for p in mp.active_children():
        left.append(f"worker {p.pid} (Ctrl-C at {where})")
        p.kill()
    return count, stopped, left


def main() -> None:
    global MODE
    MODE = sys.argv[1]
    lines, _, left = trial(None)
    assert not left, left
    bad, stopped = [], 0
    for at in range(1, lines + 1):
        faulthandler.dump_traceback_later(20, exit=True)
        _, was_stopped, left = trial(at)
        faulthandler.cancel_dump_traceback_later()
        stopped += was_stopped
        if left:
            bad.append([at, left])
            if len(bad) >= BAD_ENOUGH:
                break
    print(json.dumps({"lines": lines, "tried": at, "stopped": stopped, "bad": bad}), flush=True)
    os._exit(0)  # a failed trial may have left a thread the exit would wait for


if __name__ == "__main__":
    main()
