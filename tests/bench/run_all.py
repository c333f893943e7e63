"""Run every benchmark script in one go and collect the aims they print into one table.

Each script prints its aims as lines `AIM | aim | measured | load | verdict` (see
`sidebyside.aim`); this runs them one after another, passes their output through, and ends with
a Markdown table of every aim, the machine and the load it ran under, which is what the
README's benchmark table is made from.

    python tests/bench/run_all.py [--only NAME ...] [--quick] [--out FILE]
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]

# (script, arguments for a full run, arguments for a quick run)
SCRIPTS = [
    ("bench_generate.py", ["--shard-size", "500"], ["--n", "1000", "--shard-size", "500", "--memory", "", "--no-dask"]),
    ("bench_store_files.py", [], ["--n", "4000", "--n-files", "1500"]),
    ("bench_store_tar.py", [], ["--n", "1000", "--rounds", "2"]),
    ("bench_plan.py", [], ["--sizes", "256,512"]),
    ("bench_verify.py", [], ["--small", "20000", "--large", "200000"]),
    ("bench_scenes.py", [], []),
    ("bench_phash.py", [], ["--images", "10", "--rounds", "2"]),
    ("bench_audit.py", [], []),
    ("bench_data.py", [], ["--quick"]),
    ("bench_lookalikes.py", [], ["--random", "5"]),
    ("bench_audit_folder.py", ["--sizes", "100000", "1000000", "--rounds", "1"], ["--sizes", "5000", "20000"]),
]


def machine() -> str:
    import numpy
    import cv2
    import pyarrow
    cpu = platform.processor() or platform.machine()
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return (f"{os.cpu_count()} cores ({cpu}), {mem:.0f} GiB, Linux {platform.release()}, "
            f"Python {platform.python_version()}, numpy {numpy.__version__}, OpenCV {cv2.__version__}, "
            f"pyarrow {pyarrow.__version__}")


def run(script: str, args: list[str]) -> tuple[list[str], int, float]:
    env = dict(os.environ, PYTHONPATH=str(ROOT), MPLBACKEND="Agg")
    start = time.perf_counter()
    proc = subprocess.Popen([sys.executable, str(HERE / script), *args], env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True)
    aims = []
    for line in proc.stdout:
        sys.stdout.write(line)
        if line.startswith("AIM |"):
            aims.append(line.strip())
    return aims, proc.wait(), time.perf_counter() - start


def table(rows: list[tuple[str, str]]) -> str:
    out = ["| script | aim | measured | load | verdict |", "|---|---|---|---|---|"]
    for script, line in rows:
        _, name, measured, load, word = [c.strip() for c in line.split("|", 4)]
        out.append(f"| {script} | {name} | {measured} | {load} | {word} |")
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", nargs="*", help="script names (without .py) to run")
    ap.add_argument("--quick", action="store_true", help="smaller runs where a script offers them")
    ap.add_argument("--out", help="also write the Markdown table to this file")
    a = ap.parse_args(argv)
    rows, failed = [], []
    started = time.strftime("%Y-%m-%d %H:%M")
    for script, full, quick in SCRIPTS:
        if a.only and script.removesuffix(".py") not in a.only:
            continue
        print(f"\n######## {script} ({os.getloadavg()[0]:.1f} load)", flush=True)
        aims, code, took = run(script, quick if a.quick else full)
        print(f"######## {script}: exit {code} in {took:.0f} s", flush=True)
        rows += [(script, line) for line in aims]
        if code:
            failed.append(script)
    text = f"Run {started} on {machine()}.\n\n{table(rows)}\n"
    if failed:
        text += f"\nScripts that failed: {', '.join(failed)}\n"
    print("\n" + text)
    if a.out:
        Path(a.out).write_text(text)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
