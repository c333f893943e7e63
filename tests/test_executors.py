"""Executors: every job's result comes back exactly once, whatever dies on the way; a dask
scheduler that is not there is reported in one line, quickly, before anything is written."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from functools import partial
from pathlib import Path

import pytest

from augsplit import executors
from augsplit.errors import DatasetError


def square(job):
    return job * job


def die_once(job, marker_dir: str = ""):
    """Kills its own worker process the first time it sees job 3 (as the OOM killer would)."""
    marker = Path(marker_dir) / f"died-{job}"
    if job == 3 and not marker.exists():
        marker.touch()
        os.kill(os.getpid(), signal.SIGKILL)
    return job * job


def always_die(job):
    os.kill(os.getpid(), signal.SIGKILL)


def slow_unless_one(job, folder: str):
    """Job 1 fails at once (as a full disk would); every other job takes a while, marking its
    start and its end."""
    if job == 1:
        raise ValueError("job 1 failed")
    Path(folder, f"start-{job}").touch()
    time.sleep(0.3)
    Path(folder, f"end-{job}").touch()
    return job


def pid_and_sigint(job):
    return os.getpid(), signal.getsignal(signal.SIGINT) is signal.SIG_IGN


def test_serial_and_processes_return_every_result_once():
    jobs = list(range(20))
    got_serial = dict(executors.run_serial(square, jobs))
    got_pool = dict(executors.run_processes(square, jobs, workers=2))
    assert got_serial == got_pool == {j: j * j for j in jobs}


class Pending:
    """A job done but for its finish, logging what happens to it and on which thread."""

    def __init__(self, job, log, fail=None):
        self.job, self.log, self.fail = job, log, fail

    def finish(self):
        self.log.append(("finish", self.job, threading.current_thread() is threading.main_thread()))
        time.sleep(0.05)
        if self.job == self.fail:
            raise ValueError(f"job {self.job} failed to finish")
        self.log.append(("finished", self.job))
        return self.job * self.job

    def abandon(self):
        self.log.append(("abandon", self.job))


def overlapped(jobs, log, fail=None):
    def task(job):
        log.append(("task", job))
        time.sleep(0.02)
        return Pending(job, log, fail)

    return executors.run_serial_overlapped(task, jobs)


def test_overlapped_serial_finishes_each_job_on_a_thread_while_the_next_task_runs():
    log = []
    got = list(overlapped(range(6), log))
    assert got == [(j, j * j) for j in range(6)]  # every result once, in job order
    assert [e for e in log if e[0] == "finish"] == [("finish", j, False) for j in range(6)]  # off the main thread
    for j in range(5):  # job j's finish ended after job j+1's task began: they overlapped
        assert log.index(("task", j + 1)) < log.index(("finished", j))
    assert not any(t.name == "augsplit-finish" for t in threading.enumerate())


def test_overlapped_serial_stops_at_a_failed_finish_and_abandons_the_job_behind_it():
    log = []
    got = []
    with pytest.raises(ValueError, match="job 2 failed"):
        for item in overlapped(range(6), log, fail=2):
            got.append(item)
    assert got == [(0, 0), (1, 1)]
    assert ("abandon", 3) in log and not any(e[0] == "task" and e[1] > 3 for e in log)
    assert not any(e[0] in ("finish", "finished") and e[1] >= 3 for e in log)


def test_overlapped_serial_lets_the_finish_under_way_end_when_the_caller_stops():
    log = []
    results = overlapped(range(6), log)
    assert next(results) == (0, 0)
    results.close()  # as a Ctrl-C or an error in the caller does
    # job 1 was finishing (a commit must land whole): it ended before close returned; job 2's
    # task had not run
    assert log[-1] == ("finished", 1) and ("task", 2) not in log
    assert not any(t.name == "augsplit-finish" for t in threading.enumerate())


def test_finish_overlapped_keeps_at_most_depth_finishes_running_and_gives_results_in_order():
    """Pairs from a source (a pool's results): up to `depth` finishes run at once, on threads,
    while the next pairs come; each result once, in the order made."""
    log, running, most = [], [], [0]
    lock = threading.Lock()

    class Slow(Pending):
        def finish(self):
            with lock:
                running.append(self.job)
                most[0] = max(most[0], len(running))
            time.sleep(0.05)
            with lock:
                running.remove(self.job)
            return super().finish()

    def made():
        for j in range(8):
            time.sleep(0.01)
            yield j, Slow(j, log)

    got = list(executors.finish_overlapped(made(), depth=3))
    assert got == [(j, j * j) for j in range(8)]
    assert most[0] == 3  # the finishes overlapped one another, never more than three
    assert not any(t.name == "augsplit-finish" for t in threading.enumerate())


class Source:
    """A source of pending pairs that records how it was stopped."""

    def __init__(self, log, n=8):
        self.log, self.it = log, iter(range(n))

    def __iter__(self):
        return self

    def __next__(self):
        j = next(self.it)
        self.log.append(("task", j))
        return j, Pending(j, self.log, fail=2)

    def throw(self, exc):
        self.log.append(("thrown", type(exc).__name__))
        raise exc

    def close(self):
        self.log.append(("closed",))


def test_finish_overlapped_tells_its_source_of_a_failure_and_closes_it_otherwise():
    """A failed finish: the pending not yet finishing is abandoned, the finishes under way end,
    and the source is told (a pool then lets its running jobs end and lets their results go);
    a caller that stops (a Ctrl-C) closes the source (a pool stops at once)."""
    log = []
    with pytest.raises(ValueError, match="job 2 failed"):
        list(executors.finish_overlapped(Source(log), depth=2))
    assert ("thrown", "_Stopped") in log and ("closed",) not in log
    assert ("abandon", 4) in log and ("finished", 3) in log  # 3 was finishing: it landed
    log = []
    results = executors.finish_overlapped(Source(log), depth=2)
    next(results)
    results.close()
    assert log[-1] == ("closed",) and not any(e[0] == "thrown" for e in log)


class Held:
    """A result that holds something until it is let go of."""

    def __init__(self, job):
        self.job = job


def slow_or_failing(job, folder: str):
    if job == 1:
        time.sleep(0.1)
        raise ValueError("job 1 failed")
    time.sleep(0.3)
    return Held(job)


def quick(job):
    time.sleep(0.05)
    return Held(job)


def test_results_nobody_takes_are_let_go(tmp_path):
    """A failed job: the jobs running beside it end, and their results, which nobody takes,
    go to `lost`. The same when the caller throws a failure in (`finish_overlapped` does)."""
    lost = []
    with pytest.raises(ValueError, match="job 1 failed"):
        list(executors.run_processes(partial(slow_or_failing, folder=str(tmp_path)), list(range(12)), workers=2,
                                     lost=lambda r: lost.append(r.job)))
    assert lost and set(lost) <= {0, 2, 3}  # only jobs in flight ran; each let go of once
    assert len(lost) == len(set(lost))
    lost = []
    results = executors.run_processes(quick, list(range(12)), workers=2, lost=lambda r: lost.append(r.job))
    taken = [next(results)[0]]
    with pytest.raises(executors._Stopped):
        results.throw(executors._Stopped())
    assert lost and not set(lost) & set(taken) and len(lost) == len(set(lost))
    assert max(lost) < len(taken) + 2 * 2  # results of the jobs in flight, none started after


def test_a_dead_worker_loses_and_duplicates_nothing(tmp_path):
    import functools

    task = functools.partial(die_once, marker_dir=str(tmp_path))
    results = list(executors.run_processes(task, list(range(10)), workers=2))
    assert (tmp_path / "died-3").exists()  # the worker really died
    jobs = [j for j, _ in results]
    assert sorted(jobs) == list(range(10))  # each job reported exactly once
    assert dict(results) == {j: j * j for j in range(10)}


def test_a_job_that_always_kills_its_worker_stops_the_run():
    with pytest.raises(DatasetError, match="died"):
        list(executors.run_processes(always_die, [1, 2], workers=2, max_restarts=1))


def test_pool_workers_leave_ctrl_c_to_the_parent():
    out = dict(executors.run_processes(pid_and_sigint, list(range(4)), workers=2))
    assert all(ignored for _pid, ignored in out.values())
    assert all(pid != os.getpid() for pid, _ in out.values())


def test_a_failed_job_lets_the_running_ones_finish_and_starts_nothing_new(tmp_path):
    """A failed job (e.g. disk full) stops the run, but a job already running is not cut off
    half-way (no half-made shard) and no job beyond those in flight is started."""
    with pytest.raises(ValueError, match="job 1 failed"):
        list(executors.run_processes(partial(slow_unless_one, folder=str(tmp_path)), list(range(12)), workers=2))
    started = {p.name.split("-")[1] for p in tmp_path.glob("start-*")}
    ended = {p.name.split("-")[1] for p in tmp_path.glob("end-*")}
    assert "0" in started and started == ended  # job 0 ran alongside job 1, and finished
    assert max(map(int, started)) < 2 * 2  # only jobs in flight (2 x workers) ever ran


def test_dispatch():
    assert list(executors.run(square, [2], workers=4)) == [(2, 4)]  # one job: no pool needed
    with pytest.raises(DatasetError, match="unknown executor"):
        executors.run(square, [1], executor="mpi")


def test_unreachable_scheduler_is_one_line_exit_2_and_touches_nothing(tmp_path, capsys, monkeypatch):
    """Nothing listens on port 1 of the loopback: the CLI must give up on its own (after the
    connect timeout, shortened here), in one line, before creating the output folder."""
    from augsplit.cli import main

    monkeypatch.setattr(executors, "CONNECT_TIMEOUT_S", 1.0)
    out = tmp_path / "never"
    code = main(["generate", "demo", "--out", str(out), "--scheduler", "tcp://127.0.0.1:1", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "tcp://127.0.0.1:1" in err and "dask scheduler within 1 s" in err, err
    assert not out.exists()


def test_the_cli_gives_up_on_a_silent_scheduler_by_itself(tmp_path):
    """The real timeout, end to end; the subprocess limit only guards against a hang."""
    proc = subprocess.run([sys.executable, "-m", "augsplit.cli", "generate", "demo", "--out", str(tmp_path / "n"),
                           "--scheduler", "tcp://127.0.0.1:1", "--quiet"], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and len(proc.stderr.strip().splitlines()) == 1, proc.stderr


def test_malformed_scheduler_address_is_a_dataset_error():
    with pytest.raises(DatasetError, match="no-port-here"):
        executors.dask_client("no-port-here", 1, timeout=1)


def _made_by(key):
    return executors.shared(key, lambda: ("made", os.getpid()))


def test_tasks_share_the_drivers_value_and_a_fresh_process_makes_its_own_once():
    key = ("test", "shared")
    with executors.sharing(key, "driver's") as value:
        assert value == "driver's"
        assert [r for _, r in executors.run(_made_by, [key] * 4, 2, executor="processes")] == ["driver's"] * 4
    assert key not in executors._SHARED  # gone with the run
    made = [r for _, r in executors.run(_made_by, [key] * 3, 1, executor="serial")]
    assert made == [("made", os.getpid())] * 3  # made once, then kept
    executors._SHARED.pop(key)


@pytest.mark.parametrize("workers, executor, where", [(0, "auto", "--workers"), (True, "auto", "--workers"),
                                                      ("2", "auto", "--workers"), (1, "threads", "--executor")])
def test_bad_executor_options_are_named(workers, executor, where):
    with pytest.raises(DatasetError) as err:
        executors.check_options(workers, executor)
    assert err.value.where == where
