"""What a generation run pays besides rendering: each committed part's footer read once, and
no import of pandas or pyarrow.dataset (about 0.5 s of start-up per run and per worker)."""

from __future__ import annotations

import json
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from specs import spec_dict

from augsplit.build import open_mapping
from augsplit.dataset import layout as lay
from augsplit.generate import Options, generate


def test_each_committed_part_footer_is_read_once(tmp_path, monkeypatch):
    """Measured on main: three reads per shard (the driver's check after the shard, finalize's
    check of every shard, and opening the folder in finalize)."""
    from augsplit.dataset.images import Box

    opened: Counter = Counter()
    real, real_open = pq.ParquetFile, Box.open_file
    last = []  # the file a box opened last: parts reach ParquetFile as open files (dataset/boxfs.py)

    def open_file(self, rel, *a, **kw):
        last[:] = [Path(self.root, rel).resolve()]
        return real_open(self, rel, *a, **kw)

    class Counting(real):
        """Counts the opens that only read the footer (a check), not those that read data
        (finalize's low-visibility count reads one column)."""

        def __init__(self, source, *a, **kw):
            self._key = Path(source).resolve() if isinstance(source, (str, Path)) else last[0]
            opened[self._key] += 1
            super().__init__(source, *a, **kw)

        def read(self, *a, **kw):
            opened[self._key] -= 1
            return super().read(*a, **kw)

    monkeypatch.setattr(pq, "ParquetFile", Counting)
    monkeypatch.setattr(Box, "open_file", open_file)
    out = tmp_path / "ds"
    generate(None, out, Options(progress=False, store="none", shard_size=3), built=open_mapping(spec_dict()))
    parts = [p.resolve() for p in lay.part_files(out, lay.MANIFEST_DIR)]
    assert len(parts) > 2
    assert {p: opened[p] for p in parts} == {p: 1 for p in parts}


def test_a_resumed_run_still_redoes_a_short_part(tmp_path):
    """The driver no longer reads each footer after a shard; finalize and resume still refuse
    a part with the wrong row count (common practice, no source: a commit is checked whole)."""
    out = tmp_path / "ds"
    built = open_mapping(spec_dict())
    generate(None, out, Options(progress=False, store="none", shard_size=3), built=built)
    part = lay.part_files(out, lay.MANIFEST_DIR)[0]
    table = pq.read_table(part)
    pq.write_table(table.slice(0, 1), part)  # a part one shard short of its rows
    summary = generate(None, out, Options(progress=False, store="none", shard_size=3, resume=True), built=built)
    assert pq.ParquetFile(part).metadata.num_rows == 3 and summary["complete"]


def test_importing_the_generator_does_not_import_pandas():
    """Measured on main: `import augsplit.generate` took 1.2-1.4 s, 0.4-0.6 s of it pandas,
    pulled in by pyarrow.dataset at module level in dataset/rows.py. (pyarrow itself still
    imports pandas at the first `pa.array` of a run: see the report.)"""
    code = ("import json, sys\nimport augsplit.generate, augsplit.dataset\n"
            "print(json.dumps(sorted(m for m in ('pandas', 'pyarrow.dataset') if m in sys.modules)))")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert json.loads(res.stdout.strip().splitlines()[-1]) == []


def test_a_generation_run_imports_neither_pandas_nor_scipy(tmp_path):
    """Measured before: `import augsplit.generate` imported scipy (0.2 s: scipy.fft at the top of
    sources/backgrounds.py), and the first row group of every shard task imported pandas
    (0.5 s per process: pyarrow's `pa.array` does, in manifest.to_table); so did finalize's
    `to_numpy`. A run of every store, its worker's shard task and finalize now import neither."""
    code = f"""
import json, sys
sys.path.insert(0, {str(Path(__file__).parent)!r})
heavy = lambda: sorted(m for m in ('pandas', 'scipy') if m in sys.modules)
import augsplit.generate as g
seen = {{'import': heavy()}}
from specs import spec_dict
from augsplit.build import open_mapping
spec = dict(spec_dict(), render={{'distractors': {{'count': [0, 1]}}}})  # a distractor table as well
built = open_mapping(spec)
for store in g.STORES:
    g.generate(None, {str(tmp_path)!r} + '/' + store, g.Options(progress=False, store=store, shard_size=7), built=built)
    seen[store] = heavy()
print(json.dumps(seen))
"""
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    seen = json.loads(res.stdout.strip().splitlines()[-1])
    assert seen == {k: [] for k in ("import", "files", "parquet", "tar", "none")}


def test_forked_workers_use_the_spec_the_driver_built(tmp_path, monkeypatch):
    """Measured before: every forked pool worker parsed and planned the spec again (0.05 s for a
    small spec, seconds for a large canvas), a fixed cost per worker and run."""
    import multiprocessing as mp

    import augsplit.generate as gen

    if mp.get_start_method(allow_none=True) == "spawn":
        pytest.skip("spawned workers build their own")
    built = open_mapping(spec_dict())

    def planned_again(*a, **kw):
        raise AssertionError("a worker planned the spec again")

    monkeypatch.setattr(gen, "build", planned_again)
    generate(None, tmp_path / "ds", Options(progress=False, store="none", shard_size=3, workers=2,
                                           executor="processes", force_workers=True), built=built)
    assert (tmp_path / "ds" / lay.SUMMARY_FILE).is_file()
