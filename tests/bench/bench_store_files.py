"""Benchmark of image files at the file system's speed and of workers that scale.

1. `--store files`, one worker, the CLI's shard size (500), against the bare loop of
   bench_generate.py that warps, encodes and writes each PNG to its own file; on the disk
   holding --disk (default: this worktree) and on tmpfs (/dev/shm). Aim: within 1.3x. The
   other stores and the bare loop without writes are printed beside it, to show where the
   rest of the time goes.
2. Two workers against one at --n images (default 20,000) for every store (`files` on the
   disk and on tmpfs), over --worker-rounds rounds (default 5). Aim: at least 1.7x, the best
   1-worker run over the best 2-worker run; each round's own ratio (its 1- and 2-worker runs
   back to back) is printed beside it, to show the machine's spread. A ratio measured while
   other work took more than half a core just before one of its timed runs (sidebyside.
   others_load: other processes' CPU time and the hypervisor's steal, sampled while the
   benchmark waits) says nothing about the code: it is printed as MISS-UNRELIABLE, with the
   raw times and the other work seen.
   Beside `files` on the disk and on tmpfs, in the same rounds, what the host gives plain
   code: the bare loop doing the same disk work (encode, write each PNG, syncfs per shard of
   500, inline) in 1 and 2 processes (not a bound: generate syncs in its main process while
   workers render; on tmpfs it shows the two virtual cores' own scaling in those rounds).
3. The fixed start-up: `import augsplit.generate` in a fresh interpreter (aim: neither pandas
   nor scipy imported) and a small run (--n-small images, default 3,000) with 2 workers against
   1 (aim: faster, i.e. above 1.0x).

Every timed figure is the best of --repeat interleaved rounds; the load (/proc/loadavg) is
printed before and after each section, and with every aim (`AIM | ...` lines, sidebyside.aim),
the other work seen beside each ratio.

    python tests/bench/bench_store_files.py [--n 20000] [--n-files 3000] [--n-small 3000]
                                            [--repeat 5] [--worker-rounds 5] [--disk DIR]
                                            [--skip-workers]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve()
sys.path.insert(0, str(HERE.parent))

import bench_generate as bg  # noqa: E402 - the shared baselines and spec
from sidebyside import OTHERS_LIMIT, aim, others_load  # noqa: E402

SHARD = 500  # the CLI's default shard size (generate.Options.shard_size)
AIM_FILES, AIM_WORKERS, AIM_SMALL = 1.3, 1.7, 1.0


def load_text() -> str:
    one, five, fifteen = os.getloadavg()
    return f"load average {one:.2f} {five:.2f} {fifteen:.2f} on {os.cpu_count()} cores"


def settle(where: Path) -> None:
    """Start each timed run with every pending write flushed. Runs write to folders of their
    own (bg.fresh) and nothing is deleted while anything is timed: deleting thousands of files
    makes the next thousands of file creations on ext4 slow (bg.fresh says why); main removes
    them all at the end."""
    os.sync()


def _bare_durable_part(built, lo: int, hi: int, out: Path) -> None:
    """Images lo..hi of the bare loop into folders of SHARD files, each made durable (syncfs)
    once written, as generation makes a shard's files durable before committing it."""
    from augsplit.io import syncfs

    for k in range(lo, hi, SHARD):
        part = out / f"{k:07d}"
        part.mkdir(parents=True)
        bg.baseline_a(built, min(SHARD, hi - k), part)
        syncfs(part)


def bare_durable(built, n: int, out: Path, processes: int) -> float:
    """Seconds per image of the bare loop with durable shards (`_bare_durable_part`), its n
    images cut into `processes` equal runs, each in a forked process of its own: the same
    disk work as `--store files` with as many workers and none of its bookkeeping, each
    process syncing its own shards inline (generate overlaps them in its main process, so
    it can scale better than this loop)."""
    import multiprocessing
    import time

    ctx = multiprocessing.get_context("fork")
    t0 = time.perf_counter()
    if processes == 1:
        _bare_durable_part(built, 0, n, out)
    else:
        cuts = [n * i // processes for i in range(processes + 1)]
        procs = [ctx.Process(target=_bare_durable_part, args=(built, lo, hi, out)) for lo, hi in zip(cuts, cuts[1:])]
        for p in procs:
            p.start()
        for p in procs:
            p.join()
            if p.exitcode:
                raise RuntimeError(f"a bare-loop process failed (exit code {p.exitcode})")
    return (time.perf_counter() - t0) / n


def files_section(built, n: int, repeat: int, where: Path) -> None:
    fs = bg.fs_of(where)
    print(f"\n== --store files, 1 worker, shard {SHARD}, {n} images on {fs} ({where})")
    print(f"   before: {load_text()}")

    def bare_write():
        out = bg.fresh(where, "bare")
        out.mkdir()
        return bg.baseline_a(built, n, out)

    def bare_write_durable():
        """The bare loop, then its files made durable as generation makes each shard's before
        committing it (one syncfs per SHARD files): printed for context, not the aim's baseline."""
        return bare_durable(built, n, bg.fresh(where, "bare"), 1)

    def store(name):
        return lambda: bg.run_augsplit(built, bg.fresh(where, "ds"), store=name, shard_size=SHARD)

    configs = [("bare: warp + encode PNG", lambda: bg.baseline_a(built, n)),
               ("bare + write each PNG to a file", bare_write),
               ("bare + write + syncfs per 500 (context)", bare_write_durable),
               ("augsplit --store none (no encode)", store("none")),
               ("augsplit --store parquet", store("parquet")),
               ("augsplit --store files", store("files"))]
    got = {}
    for _ in range(repeat):  # interleaved: each round runs every configuration once
        for label, fn in configs:
            settle(where)
            got[label] = min(got.get(label, float("inf")), fn())
    base = got["bare + write each PNG to a file"]
    for label, _fn in configs:
        print(f"   {label:40s} {got[label] * 1e6:7.0f} us/img  {got[label] / base:5.2f}x bare+write")
    ratio = got["augsplit --store files"] / base
    aim(f"--store files within {AIM_FILES}x of bare encode + write, 1 worker, {fs.split()[0]}",
        f"{ratio:.2f}x ({got['augsplit --store files'] * 1e6:.0f} vs {base * 1e6:.0f} us/img, {n} images)",
        ratio <= AIM_FILES)
    print(f"   after: {load_text()}")


BARE = "bare"  # in two_vs_one: the bare durable loop (bare_durable) in 1 and 2 processes, not a store


def two_vs_one(built, stores_where: list[tuple[str, Path]], repeat: int) -> tuple[dict, bool]:
    """Time per image of 1 and 2 workers for each (store, folder), interleaved: a list of one
    time per round, keyed (store, folder, workers); and the most other work seen just before
    a timed run (`others_load`, cores). The store BARE is the bare durable loop."""
    most = 0.0
    got: dict = {}
    for _ in range(repeat):
        for store, where in stores_where:
            for w in (1, 2):
                settle(where)
                most = max(most, others_load())
                if store == BARE:
                    t = bare_durable(built, sum(s.total for s in built.plan.splits), bg.fresh(where, "bare"), w)
                else:
                    t = bg.run_augsplit(built, bg.fresh(where, "ds"), store=store, workers=w, shard_size=SHARD)
                got.setdefault((store, str(where), w), []).append(t)
    return got, most


def rounds_text(ones: list[float], twos: list[float]) -> str:
    """The spread of the rounds' own 1-over-2-worker ratios (each round's runs back to back)."""
    ratios = sorted(a / b for a, b in zip(ones, twos))
    return f"rounds {ratios[0]:.2f}x-{ratios[-1]:.2f}x, median {ratios[len(ratios) // 2]:.2f}x"


def ratio_text(one: float, two: float, busy: bool, unit: str, scale: float) -> str:
    """1 worker vs 2 as a ratio, or, measured while other work competed for the cores (`busy`),
    only the raw times: such a ratio says nothing about the code and is not reported."""
    times = f"1 worker {one * scale:.3g}, 2 workers {two * scale:.3g} {unit}"
    if busy:
        return f"no ratio (other work above {OTHERS_LIMIT} cores before a timed run): {times}"
    return f"{one / two:.2f}x ({times})"


def workers_section(n: int, repeat: int, disk: Path, shm: Path) -> None:
    from augsplit.build import open_mapping
    from augsplit.generate import STORES

    built = open_mapping(bg.spec_dict(n))
    runs = [(s, shm) for s in STORES] + [("files", disk), (BARE, disk), (BARE, shm)]
    print(f"\n== 2 workers vs 1, {n} images, shard {SHARD}; `files` on {bg.fs_of(disk)} and on {bg.fs_of(shm)}")
    print(f"   before: {load_text()}")
    got, most = two_vs_one(built, runs, repeat)
    busy = most > OTHERS_LIMIT
    print(f"   other work before the timed runs: at most {most:.2f} cores (refused above {OTHERS_LIMIT})")
    for store, where in runs:
        if store == BARE:
            continue
        ones, twos = got[store, str(where), 1], got[store, str(where), 2]
        one, two = min(ones), min(twos)
        fs = bg.fs_of(where).split()[0]
        print(f"   --store {store:8s} on {fs:6s} 1 worker {one * 1e6:6.0f} us/img, 2 workers {two * 1e6:6.0f} us/img"
              f" (best of {repeat}); {rounds_text(ones, twos)}")
        aim(f"2 workers at least {AIM_WORKERS}x one, --store {store} on {fs}, {n} images",
            ratio_text(one, two, busy, "us/img", 1e6), one / two >= AIM_WORKERS, needs_idle=True, busy=busy)
    # Beside them, what the host gives plain code: the bare loop doing --store files' disk work
    # (encode, write each file, syncfs per shard) in 1 and 2 processes, in the same rounds, on
    # each file system. Not a bound: each bare process syncs its own shards inline, where
    # generate's main process syncs while the workers go on rendering. On tmpfs, where syncfs
    # costs nothing, it is the 2 virtual cores' own scaling for this kind of work (measured
    # 2026-12-04 on this machine for a pure Python loop run 1-2 s: 1.64x-2.06x between rounds)
    for where in (disk, shm):
        ones, twos = got[BARE, str(where), 1], got[BARE, str(where), 2]
        files = min(got["files", str(where), 1]) / min(got["files", str(where), 2])
        bare = min(ones) / min(twos)
        print(f"   beside it on {bg.fs_of(where).split()[0]}: the bare loop (encode + write each PNG + syncfs per "
              f"{SHARD} inline) 1 process {min(ones) * 1e6:6.0f} us/img, 2 processes {min(twos) * 1e6:6.0f} us/img: "
              f"{bare:.2f}x; {rounds_text(ones, twos)}; --store files' ratio there is {files / bare:.2f} times that")
    print(f"   after: {load_text()}")


def startup_section(n_small: int, repeat: int, shm: Path) -> None:
    from augsplit.build import open_mapping

    print("\n== start-up: `import augsplit.generate` in a fresh interpreter, best of 3")
    env = dict(os.environ, PYTHONPATH=str(HERE.parents[2]))
    code = ("import json, sys, time; t = time.perf_counter(); import augsplit.generate; "
            "print(json.dumps([time.perf_counter() - t, [m for m in ('pandas', 'scipy') if m in sys.modules]]))")
    runs = [json.loads(subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                                      check=True, cwd=tempfile.gettempdir()).stdout)
            for _ in range(3)]
    seconds, heavy = min(runs)
    print(f"   {seconds:.2f} s; heavy modules imported: {heavy or 'none'}   ({load_text()})")
    aim("import augsplit.generate loads neither pandas nor scipy", f"{seconds:.2f} s, imported: {heavy or 'neither'}",
        not heavy)
    built = open_mapping(bg.spec_dict(n_small))
    print(f"\n== a small run: {n_small} images, --store parquet on tmpfs, 2 workers vs 1")
    got, most = two_vs_one(built, [("parquet", shm)], repeat)
    busy = most > OTHERS_LIMIT
    one, two = min(got["parquet", str(shm), 1]), min(got["parquet", str(shm), 2])
    aim(f"a small run gains from 2 workers ({n_small} images, --store parquet)",
        ratio_text(one, two, busy, "s per run", n_small), one / two > AIM_SMALL, needs_idle=True, busy=busy)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=20000, help="images per run in the workers section")
    ap.add_argument("--n-files", type=int, default=3000, help="images per run in the files section")
    ap.add_argument("--n-small", type=int, default=3000, help="images of the small run in the start-up section")
    ap.add_argument("--repeat", type=int, default=5, help="interleaved rounds per figure (the best is kept)")
    ap.add_argument("--worker-rounds", type=int, default=5,
                    help="interleaved rounds of the workers section, whose 2-worker runs a busy spell hits hardest")
    ap.add_argument("--disk", default=str(HERE.parents[2]), help="a folder on the real disk to measure")
    ap.add_argument("--skip-workers", action="store_true")
    a = ap.parse_args()
    from augsplit.build import open_mapping

    print(bg.machine())
    made = [Path(tempfile.mkdtemp(prefix=".bench-files-", dir=parent)) for parent in (a.disk, "/dev/shm")]
    disk, shm = made
    try:
        startup_section(a.n_small, a.repeat, shm)
        built = open_mapping(bg.spec_dict(a.n_files))
        for where in made:
            files_section(built, a.n_files, a.repeat, where)
        if not a.skip_workers:
            workers_section(a.n, a.worker_rounds, disk, shm)
    finally:
        for d in made:
            shutil.rmtree(d, ignore_errors=True)


if __name__ == "__main__":
    main()
