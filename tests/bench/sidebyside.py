"""Helpers for benchmarks that compare this tree with an earlier commit side by side.

`export(ref)` unpacks the package as it was at a git ref into a temporary folder; `child(...)`
runs a measurement in a fresh Python whose `augsplit` is either this tree's or that export's,
and returns the JSON it prints. `load()` describes the machine's load; `verdict()` is the
PASS/MISS word every aim is printed with; `aim(...)` prints one aim as the single line
`AIM | aim | measured | load | verdict` that `run_all.py` collects into the README's table.
"""

from __future__ import annotations

import atexit
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def scratch(given: str | None, prefix: str) -> Path:
    """The folder a benchmark makes its datasets in: --tmp if given (made if missing, kept), else a
    new temporary folder, removed when the script exits (a 1,000,000-image run leaves 0.8 GB)."""
    if given:
        path = Path(given)
        path.mkdir(parents=True, exist_ok=True)
        return path
    path = Path(tempfile.mkdtemp(prefix=prefix))
    atexit.register(shutil.rmtree, path, True)
    return path


def export(ref: str) -> Path:
    """The `augsplit` package at git ref `ref`, unpacked into a fresh temporary folder."""
    dest = Path(tempfile.mkdtemp(prefix="augsplit-ref-"))
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", ref, "augsplit"], check=True, capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", str(dest)], input=archive, check=True)
    return dest


def child(script: Path, args: list[str], tree: Path | None = None, timeout: float = 3600) -> dict:
    """Run `python script args` with `tree` (default: this tree) first on the path; the
    child prints one JSON object on its last line, which is returned."""
    env = dict(os.environ, PYTHONPATH=str(tree or ROOT), MPLBACKEND="Agg")
    r = subprocess.run([sys.executable, str(script), *args], env=env, capture_output=True, text=True, timeout=timeout)
    if r.returncode != 0:
        raise RuntimeError(f"{script.name} {' '.join(args)} failed:\n{r.stderr[-2000:]}")
    return json.loads(r.stdout.strip().splitlines()[-1])


def make_dataset(spec: dict, out: Path, store: str, workers: int = 2, tree: Path | None = None) -> Path:
    """Generate `spec` (a dict) into `out` with the CLI in a fresh Python (this tree's
    `augsplit`, or `tree`'s), unless a finished dataset is already there; returns `out`."""
    import yaml

    if (out / "dataset.json").exists():
        return out
    spec_file = out.with_name(f"{out.name}.yaml")
    spec_file.write_text(yaml.safe_dump(spec, sort_keys=False))
    env = dict(os.environ, PYTHONPATH=str(tree or ROOT), MPLBACKEND="Agg")
    subprocess.run([sys.executable, "-m", "augsplit.cli", "generate", str(spec_file), "--out", str(out),
                    "--store", store, "--workers", str(workers), "--quiet"], check=True, env=env,
                   stderr=subprocess.DEVNULL, cwd=out.parent)
    return out


def load() -> str:
    one, five, _ = os.getloadavg()
    return f"load average {one:.2f} (1 min), {five:.2f} (5 min) on {os.cpu_count()} cores"


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


OTHERS_LIMIT = 0.5  # cores: above this, other work competed with the runs a ratio compares


def others_load(window: float = 0.5) -> float:
    """Cores' worth of CPU time taken by everything but this benchmark over `window` seconds
    while it waits (its timed runs finished): every process's user and system time, and the
    time the hypervisor gave this machine's cores to others (steal), from /proc/stat, less
    this process's own. Unlike the 1-minute load average, it does not count the benchmark's
    own runs that just ended (2 workers on 2 cores keep that average near 2 for a minute), nor
    tasks waiting on the disk (syncfs), and it sees a shared host's steal. Where /proc/stat
    is missing: the 1-minute load average, as an upper bound."""
    import time

    def sample():
        try:
            with open("/proc/stat") as f:
                v = [int(x) for x in f.readline().split()[1:]]
        except (OSError, ValueError):
            return None
        busy = v[0] + v[1] + v[2] + v[5] + v[6] + (v[7] if len(v) > 7 else 0)  # user nice system irq softirq steal
        return busy, sum(v[:8]), sum(os.times()[:2])

    a = sample()
    time.sleep(window)
    b = sample()
    if a is None or b is None or b[1] <= a[1]:
        return os.getloadavg()[0]
    cores = os.cpu_count() or 1
    others = (b[0] - a[0]) / (b[1] - a[1]) * cores - (b[2] - a[2]) / window
    return max(0.0, others)


def aim(name: str, measured: str, ok: bool, *, needs_idle: bool = False, busy: bool = False) -> str:
    """Print one aim as `AIM | name | measured | load | PASS or MISS` and return the verdict.

    With `needs_idle` (a ratio between runs that compete for cores, such as 2 workers vs 1),
    a measurement taken while other work competed for the cores is reported as
    MISS-UNRELIABLE: other work now above OTHERS_LIMIT (`others_load`), or `busy` (the
    caller saw it before one of its timed runs). The load column gives the 1-minute load average (the benchmark's own
    runs included) and, for such a ratio, the other work seen (`others_load`, in cores)."""
    word = verdict(ok)
    others = None
    if needs_idle:
        others = others_load()
        if busy or others > OTHERS_LIMIT:
            word = "MISS-UNRELIABLE"
    one = os.getloadavg()[0]
    seen = "" if others is None else f", other work {others:.2f} cores"
    print(f"AIM | {name} | {measured} | load {one:.1f} on {os.cpu_count()} cores{seen} | {word}", flush=True)
    return word
