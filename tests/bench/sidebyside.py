"""Helpers for benchmarks that compare this tree with an earlier commit side by side.

`export(ref)` unpacks the package as it was at a git ref into a temporary folder; `child(...)`
runs a measurement in a fresh Python whose `augsplit` is either this tree's or that export's,
and returns the JSON it prints. `load()` describes the machine's load; `verdict()` is the
PASS/MISS word every aim is printed with.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


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


def load() -> str:
    one, five, _ = os.getloadavg()
    return f"load average {one:.2f} (1 min), {five:.2f} (5 min) on {os.cpu_count()} cores"


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"
