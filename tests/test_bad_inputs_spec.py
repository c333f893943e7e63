"""Bad specs and bad options, through the real command line: each case must give its exit
code, exactly one stderr line naming what and where, no traceback, and leave the folder
around it exactly as it was (nothing written, nothing escaped, nothing removed).

Cases marked `isolate` cost the current main gigabytes or minutes, crashed it or blocked it
forever; they run in a child process with a 2 GB address-space limit and a timeout, so a
regression fails the test, not the machine.
"""

from __future__ import annotations

import copy
import os
import re
import resource
import struct
import subprocess
import sys
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import cv2
import numpy as np
import pytest
import yaml

import augsplit
from augsplit.cli import main

from specs import BASE, refusal_line, snapshot

SPEC = "spec.yaml"


# ---- building inputs -------------------------------------------------------------------------


def dump(d: dict) -> str:
    return yaml.safe_dump(d, sort_keys=False)


def spec(mutate: Callable[[dict], None] | None = None, **top) -> Callable[[Path], None]:
    """A maker writing BASE (top-level keys replaced, then `mutate`d) to DIR/spec.yaml."""
    def make(root: Path) -> None:
        d = copy.deepcopy(BASE)
        d.update(copy.deepcopy(top))
        if mutate is not None:
            mutate(d)
        (root / SPEC).write_text(dump(d))
    return make


def raw(text: str) -> Callable[[Path], None]:
    def make(root: Path) -> None:
        (root / SPEC).write_text(text)
    return make


def appended(text: str) -> Callable[[Path], None]:
    return raw(dump(BASE) + text)


def split(name, region=None, **kw) -> Callable[[dict], None]:
    """Add a split `name` (per_class: 1 unless `kw` says otherwise; None drops a key)."""
    def mutate(d):
        s = {"region": region or {"x": [44, 64]}, "per_class": 1, **kw}
        d["splits"][name] = {k: v for k, v in s.items() if v is not None}
    return mutate


def both(*makers) -> Callable[[Path], None]:
    def make(root: Path) -> None:
        for m in makers:
            m(root)
    return make


def png_header_only(w: int, h: int, body: bytes | None = None) -> bytes:
    """A PNG announcing w x h (8-bit grey) with a tiny pixel stream (or `body` as IDAT)."""
    def chunk(kind, data):
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)
    idat = zlib.compress(b"\0" * 64) if body is None else body
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", idat) + chunk(b"IEND", b"")


def sprites(files: dict[str, bytes | None]) -> Callable[[Path], None]:
    """DIR/sprites/<class>/<file> (None: a good 8x8 sprite; b'FIFO': a named pipe)."""
    def make(root: Path) -> None:
        good = cv2.imencode(".png", np.full((8, 8), 255, np.uint8))[1].tobytes()
        for rel, data in files.items():
            p = root / "sprites" / rel
            p.parent.mkdir(parents=True, exist_ok=True)
            if data == b"FIFO":
                os.mkfifo(p)
            else:
                p.write_bytes(good if data is None else data)
    return make


def folder_objects(**kw) -> Callable[[Path], None]:
    return spec(objects={"kind": "folder", "path": "sprites", **kw},
                canvas={"width": 64, "height": 64, "mode": "gray"})


def alias_bomb(levels: int, fan: int) -> str:
    text = dump({k: v for k, v in BASE.items() if k != "splits"}) + "splits:\n"
    text += "  train: {region: {any_of: [&a0 {x: [0, 20]}]}, per_class: 1}\n"
    for i in range(1, levels + 1):
        refs = ", ".join([f"*a{i - 1}"] * fan)
        text += f"  t{i}: {{role: test, region: &a{i} {{any_of: [{refs}]}}, per_class: 1}}\n"
    return text


# ---- the cases -------------------------------------------------------------------------------


@dataclass(frozen=True)
class Case:
    id: str
    make: Callable[[Path], None]
    says: tuple[str, ...]  # the one stderr line contains each of these
    args: tuple[str, ...] = ("generate", "{spec}", "--out", "{out}")
    code: int = 2
    line_has: str | None = None  # the spec line the message points at (spec.yaml:N) contains this
    isolate: bool = False


PLAN = ("plan", "{spec}")

CASES = [
    # -- names that become paths (issue: a split named ../../ESCAPED wrote outside --out) --
    Case("split-escapes-out", spec(split("../../ESCAPED")), ("splits.../../ESCAPED", "'/'"), line_has="ESCAPED"),
    Case("split-slash", spec(split("a/b")), ("splits.a/b", "'/'"), line_has="a/b"),
    Case("split-backslash", spec(split("a\\b")), ("'\\\\'",)),
    Case("split-dot-first", spec(split(".hidden")), ("splits..hidden", "starts with '.'"), line_has=".hidden"),
    Case("split-dotdot", spec(split("..")), ("starts with '.'",)),
    Case("split-empty", spec(split("")), ("cannot be empty",)),
    Case("split-space", spec(split("my split")), ("splits.my split", "' '"), line_has="my split"),
    Case("split-too-long", spec(split("s" * 200)), ("200 characters", "at most 128"), args=PLAN),
    Case("split-non-ascii", spec(split("tränen")), ("'ä'",), args=PLAN),
    Case("split-newline", spec(split("a\nb")), ("'\\n'",), args=PLAN),
    Case("split-int-name", appended("  7: {region: {x: [44, 64]}, per_class: 1}\n"), ("a name is text, not int",)),
    Case("split-case-clash", spec(split("Train")), ("'train' and 'Train' differ only in case",)),
    Case("mask-suffix-glob", both(sprites({"cls/a.png": None}), folder_objects(mask_suffix="*")),
         ("objects.mask_suffix", "'*'"), line_has="mask_suffix"),
    Case("folder-class-space", both(sprites({"my class/a.png": None}), folder_objects()),
         ("my class", "' '"), args=PLAN),
    Case("folder-instance-space", both(sprites({"cls/a b.png": None}), folder_objects()), ("a b.png", "' '"),
         args=PLAN),
    Case("folder-instance-dotdot-like", both(sprites({"cls/a.png": None, "cls/x..y=z.png": None}), folder_objects()),
         ("x..y=z.png", "'='"), args=PLAN),
    # -- duplicate keys (a second train: silently replaced the first; seed: 99 changed the hash) --
    Case("duplicate-split", appended("  train: {region: {x: [0, 10]}, per_class: 1}\n"),
         ("duplicate key 'train'", "splits.train"), line_has="train: {region: {x: [0, 10]}"),
    Case("duplicate-seed", appended("seed: 99\n"), ("duplicate key 'seed'", "first given at line 1"), args=PLAN,
         line_has="seed: 99"),
    Case("duplicate-axis-key", raw(dump(BASE).replace("range:\n    - 0\n    - 64\n", "range: [0, 64]\n    range: [0, 32]\n", 1)),
         ("duplicate key 'range'", "axes.x.range"), args=PLAN, line_has="[0, 32]"),
    Case("duplicate-region-key", appended("  t2: {region: {x: [44, 64], x: [50, 64]}, per_class: 1}\n"),
         ("duplicate key 'x'", "splits.t2.region.x"), args=PLAN, line_has="t2:"),
    # -- YAML size --
    Case("alias-bomb", raw(alias_bomb(6, 10)), ("limits.MAX_YAML_NODES",), args=PLAN, isolate=True),
    Case("alias-recursive", raw(dump(BASE) + "anchors: &r [*r]\n"), ("refers to a node that contains it",), args=PLAN),
    Case("spec-too-big", raw(dump(BASE) + "#" * (5 << 20) + "\n"), ("limits.MAX_SPEC_BYTES",), args=PLAN),
    Case("spec-is-fifo", lambda root: os.mkfifo(root / SPEC), ("not a file",), args=PLAN),
    Case("spec-is-folder", lambda root: (root / SPEC).mkdir(), ("not a file",), args=PLAN),
    Case("spec-missing", lambda root: None, ("no such file",), args=PLAN),
    Case("spec-two-documents", raw(dump(BASE) + "---\nseed: 2\n"), ("not valid YAML",), args=PLAN),
    # -- numbers generate cannot use (each was a traceback after spec.json was written) --
    Case("seed-too-large", spec(seed=10**21), ("seed", "does not fit in 64 bits"), line_has="seed"),
    Case("seed-above-int64-max", spec(seed=2**63 - 1 + 1), ("seed", "64 bits"), args=PLAN),
    Case("seed-negative", spec(seed=-1), ("seed", "greater than or equal to 0"), args=PLAN),
    Case("seed-float", spec(seed=1.5), ("seed",), args=PLAN),
    Case("levels-nan", spec(axes={"x": {"range": [0, 64]}, "scale": {"levels": [float("nan"), 1.0]}}),
         ("axes.scale.levels.0", "not a finite number"), line_has=".nan"),
    Case("range-inf", spec(axes={"x": {"range": [0, float("inf")]}}), ("axes.x.range.1", "not a finite"),
         args=PLAN, line_has=".inf"),
    # a letter outside ASCII (measured before: refused by a message saying names "may use letters")
    Case("split-name-not-ascii", spec(split("tëst")), ("splits.tëst", "'ë'", "ASCII letters"), args=PLAN),
    # a range of finite ends whose width overflowed (measured before: plan ZeroDivisionError or
    # TypeError tracebacks, generate ValueError "render parameters must be finite")
    Case("range-overflows", spec(axes={"x": {"range": [-1e308, 1e308]}}),
         ("axes.x.range", "beyond the largest axis value", "MAX_AXIS_VALUE")),
    Case("range-overflows-plan", spec(axes={"x": {"range": [-1e308, 1e308]}}), ("axes.x.range", "MAX_AXIS_VALUE"),
         args=PLAN),
    Case("levels-huge", spec(axes={"x": {"range": [0, 64]}, "hue": {"levels": [0, 1e300]}}),
         ("axes.hue.levels", "MAX_AXIS_VALUE"), args=PLAN),
    Case("region-nan", spec(split("t2", region={"x": [0, float("nan")]})), ("splits.t2.region.x.1", "finite"),
         args=PLAN, line_has=".nan"),
    Case("viewing-inf", spec(viewing={"distance_cm": float("inf"), "px_per_cm": 38}), ("viewing.distance_cm",),
         args=PLAN),
    Case("background-nan", spec(background={"kind": "pink_noise", "mean": float("nan")}), ("background.mean",),
         args=PLAN),
    Case("alpha-threshold-nan", spec(render={"alpha_threshold": float("nan")}), ("render.alpha_threshold",),
         args=PLAN),
    Case("region-huge-int", spec(split("t2", region={"x": [0, 10**30]})), ("splits.t2.region.x.1", "64 bits"),
         args=PLAN),
    Case("audit-threshold-inf", spec(audit={"margin": float("-inf")}), ("audit.margin", "finite"), args=PLAN),
    # -- canvas --
    Case("canvas-1e9", spec(canvas={"width": 10**9, "height": 10**9}), ("canvas.width", "limits.MAX_CANVAS_SIDE"),
         isolate=True, line_has="width"),
    Case("canvas-too-many-pixels", spec(canvas={"width": 16384, "height": 16384}),
         ("canvas", "limits.MAX_CANVAS_PIXELS"), isolate=True),
    Case("canvas-zero", spec(canvas={"width": 0, "height": 64}), ("canvas.width",), args=PLAN),
    Case("canvas-text", spec(canvas={"width": "wide", "height": 64}), ("canvas.width",), args=PLAN),
    # -- counts --
    Case("per-class-huge", spec(lambda d: d["splits"]["train"].update(per_class=10**8)),
         ("splits.train.per_class", "limits.MAX_SPLIT_IMAGES"), line_has="per_class", isolate=True),
    Case("count-huge", spec(split("t2", count=10**12, per_class=None)), ("splits.t2.count", "limits.MAX_SPLIT_IMAGES"),
         args=PLAN),
    Case("split-images-over-limit", spec(lambda d: d["splits"]["train"].update(per_class=6_000_000)),
         ("splits.train", "12,000,000 images", "limits.MAX_SPLIT_IMAGES"), args=PLAN),
    Case("all-images-over-limit", spec(lambda d: d["splits"].update(
        {f"s{i}": {"region": {"x": [44, 64]}, "count": 10_000_000, "role": "test"} for i in range(11)})),
         ("splits", "limits.MAX_IMAGES"), args=PLAN),
    Case("per-class-zero", spec(lambda d: d["splits"]["train"].update(per_class=0)), ("splits.train.per_class",),
         args=PLAN),
    # -- distractors --
    Case("distractors-reversed", spec(render={"distractors": {"count": [5, 2]}}),
         ("render.distractors.count", "min is above max"), line_has="count"),
    Case("distractors-too-many", spec(render={"distractors": {"count": [0, 10**6]}}),
         ("render.distractors.count", "limits.MAX_DISTRACTORS"), args=PLAN),
    Case("distractor-attempts", spec(render={"distractors": {"count": [0, 1], "attempts": 10**9}}),
         ("render.distractors.attempts", "limits.MAX_PLACEMENT_ATTEMPTS"), args=PLAN),
    Case("distractor-tries", spec(render={"distractors": {"count": [0, 100], "attempts": 1000}}),
         ("render.distractors", "100,000 placements", "limits.MAX_PLACEMENT_TRIES"), args=PLAN),
    Case("scale-1e4", spec(axes={"x": {"range": [0, 64]}, "scale": {"range": [1, 10000]}}),
         ("axes.scale", "limits.MAX_SCALED_SPRITE_PIXELS"), isolate=True),  # main: OpenCV asked for 37 GB
    Case("band-between-levels", spec(axes={"x": {"range": [0, 64]}, "mirror": {"levels": [0, 1]}},
                                     splits={"train": {"region": {"band": {"axis": "mirror", "at": [0.3, 0.45]}},
                                                       "per_class": 1}}),
         ("splits.train.region.band.at", "holds none of the levels of axis 'mirror'"), args=PLAN, line_has="at:"),
    Case("colour-huge", spec(objects={"kind": "polyomino", "cells": 3, "cell_px": 4, "colour": 1e300}),
         ("objects.colour", "less than or equal to 1"), args=PLAN),
    Case("distractors-negative", spec(render={"distractors": {"count": [-1, 2]}}), ("render.distractors.count",),
         args=PLAN),
    # -- regions --
    Case("grid-1e10-cells", spec(split("t2", region={"cells": {"grid": {"x": 100000, "y": 100000}}})),
         ("splits.t2.region.cells.grid", "10,000,000,000 cells", "limits.MAX_GRID_CELLS"), isolate=True,
         line_has="grid"),
    Case("grid-3000-bins", spec(split("t2", region={"cells": {"grid": {"x": 3000}}})),
         ("limits.MAX_GRID_CELLS",), args=PLAN),
    Case("region-too-many-boxes", spec(axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}},
                                       splits={"train": {"region": {
                                           "x": [[i / 10, i / 10 + 0.05] for i in range(60)],
                                           "y": [[i / 10, i / 10 + 0.05] for i in range(60)]}, "per_class": 1}}),
         ("splits.train.region.y", "3,600 boxes", "limits.MAX_REGION_BOXES"), args=PLAN),
    # -- object sources and backgrounds --
    Case("polyomino-cell-px", spec(objects={"kind": "polyomino", "cells": 3, "cell_px": 10**6}),
         ("objects.cell_px", "limits.MAX_SPRITE_PIXELS"), args=PLAN, line_has="cell_px"),
    Case("glyph-height", spec(objects={"kind": "glyphs", "texts": ["A"], "height_px": 10**6}),
         ("objects.height_px", "limits.MAX_SPRITE_SIDE"), args=PLAN, isolate=True),  # main: a segfault
    Case("glyph-thickness", spec(objects={"kind": "glyphs", "texts": ["A"], "thickness": 10**6}),
         ("objects.thickness",), args=PLAN, isolate=True),
    Case("sprite-30000-px", both(sprites({"cls/huge.png": png_header_only(30000, 30000)}), folder_objects()),
         ("huge.png", "30000x30000", "limits.MAX_SPRITE_PIXELS"), isolate=True),
    Case("sprite-fifo", both(sprites({"cls/a.png": None, "cls/pipe.png": b"FIFO"}), folder_objects()),
         ("pipe.png", "not a regular file"), args=PLAN, isolate=True),  # main: blocked forever
    Case("sprite-broken-body", both(sprites({"cls/bad.png": png_header_only(8, 8, body=b"\x78\x9c garbage")}),
                                    folder_objects()),
         ("bad.png", "not a readable image"), args=PLAN),
    Case("background-huge", both(lambda root: (root / "bg").mkdir() or (root / "bg" / "big.png").write_bytes(
        png_header_only(20000, 20000)), spec(background={"kind": "folder", "path": "bg"})),
         ("big.png", "limits.MAX_BACKGROUND_PIXELS"), isolate=True),
    # -- generate options --
    Case("quality-200", spec(), ("--quality", "0..100"),
         args=("generate", "{spec}", "--out", "{out}", "--format", "jpeg", "--quality", "200")),
    Case("quality-negative-webp", spec(), ("--quality", "1..100"),
         args=("generate", "{spec}", "--out", "{out}", "--format", "webp", "--quality", "-1")),
    Case("quality-zero-webp", spec(), ("--quality", "1..100", "webp"),
         args=("generate", "{spec}", "--out", "{out}", "--format", "webp", "--quality", "0")),
    Case("png-level-12", spec(), ("--png-level", "0..9", "12"),
         args=("generate", "{spec}", "--out", "{out}", "--png-level", "12")),
    Case("png-level-negative", spec(), ("--png-level", "0..9", "-1"),
         args=("generate", "{spec}", "--out", "{out}", "--png-level", "-1")),
    Case("png-level-word", spec(), ("argument --png-level", "invalid int value: 'fast'"),
         args=("generate", "{spec}", "--out", "{out}", "--png-level", "fast")),
    Case("workers-zero", spec(), ("--workers", "at least 1"), args=("generate", "{spec}", "--out", "{out}", "--workers", "0")),
    Case("workers-forced-too-many", spec(), ("--workers", "limits.MAX_WORKERS"),
         args=("generate", "{spec}", "--out", "{out}", "--workers", "100000", "--force-workers")),
    Case("workers-not-int", spec(), ("argument --workers", "invalid int value: 'x'"),
         args=("generate", "{spec}", "--out", "{out}", "--workers", "x")),
    Case("shard-not-k-n", spec(), ("argument --shard", "'abc' is not K/N"),
         args=("generate", "{spec}", "--out", "{out}", "--shard", "abc")),
    Case("shard-out-of-range", spec(), ("--shard", "K must lie in 0..1"),
         args=("generate", "{spec}", "--out", "{out}", "--shard", "3/2")),
    Case("shard-size-zero", spec(), ("--shard-size", "at least 1"),
         args=("generate", "{spec}", "--out", "{out}", "--shard-size", "0")),
    # objects kept inside the canvas: the spec itself gives no plan warning, so the refusal is the one line
    Case("too-many-shards", spec(lambda d: d["splits"]["train"].update(per_class=600_000), render={"keep_inside": True}),
         ("--shard-size", "1,200,000 shards", "limits.MAX_SHARDS_PER_SPLIT"),
         args=("generate", "{spec}", "--out", "{out}", "--shard-size", "1"), isolate=True),
    Case("format-gif", spec(), ("argument --format", "invalid choice: 'gif'"),
         args=("generate", "{spec}", "--out", "{out}", "--format", "gif")),
    Case("unknown-option", spec(), ("unrecognized arguments: --colour",),
         args=("generate", "{spec}", "--out", "{out}", "--colour", "red")),
    Case("out-missing", spec(), ("the following arguments are required: --out",), args=("generate", "{spec}")),
    Case("no-command", spec(), ("required: command",), args=()),
    Case("unknown-command", spec(), ("argument command", "invalid choice: 'plna'"), args=("plna", "{spec}")),
    Case("assign-bad-spec", spec(split("../x")), ("splits.../x",), args=("assign", "{spec}", "{dir}/t.csv")),
]


# ---- running them ----------------------------------------------------------------------------



def _limited():
    resource.setrlimit(resource.RLIMIT_AS, (2 << 30, 2 << 30))


def run_cli(args: list[str], isolate: bool, capfd) -> tuple[int, str]:
    if isolate:  # a child process that cannot take the machine down with it
        env = dict(os.environ, PYTHONPATH=str(Path(augsplit.__file__).resolve().parents[1]),
                   OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        r = subprocess.run([sys.executable, "-m", "augsplit.cli", *args], capture_output=True, text=True,
                           timeout=90, preexec_fn=_limited, env=env)
        return r.returncode, r.stderr
    try:
        code = main(args)
    except SystemExit as exc:
        code = exc.code
    return code, capfd.readouterr().err


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(case: Case, tmp_path, capfd):
    root = tmp_path / "work"
    root.mkdir()
    (root / "t.csv").write_text("x,y\n1,2\n")
    case.make(root)
    before = snapshot(tmp_path)
    spec_path = root / SPEC
    args = [a.format(spec=spec_path, out=root / "deep" / "out", dir=root) for a in case.args]
    code, err = run_cli(args, case.isolate, capfd)
    line = refusal_line(code, err, case.code, case.says)
    if case.line_has is not None:
        m = re.search(re.escape(str(spec_path)) + r":(\d+):", line)
        assert m, f"no {spec_path}:LINE in: {line}"
        assert case.line_has in spec_path.read_text().splitlines()[int(m.group(1)) - 1], line
    assert snapshot(tmp_path) == before, "the folder around --out changed"


def test_the_corpus_is_large_enough():
    assert len(CASES) >= 50


def test_split_names_cannot_escape_through_any_api(tmp_path):
    # the library entry points share the spec boundary with the CLI
    from augsplit.build import open_mapping
    from augsplit.errors import SpecError

    d = copy.deepcopy(BASE)
    d["splits"]["../../ESCAPED"] = d["splits"].pop("test")
    with pytest.raises(SpecError) as e:
        open_mapping(d)
    assert e.value.where == "splits.../../ESCAPED"


def test_class_names_never_become_paths(tmp_path):
    # glyph texts are class names and may hold any printable character ("/" and ".." too):
    # image files and manifest partitions are named by split and index only
    import pandas as pd

    from augsplit.generate import Options, generate

    d = copy.deepcopy(BASE)
    d["objects"] = {"kind": "glyphs", "texts": ["../../x", "?", "a/b"], "height_px": 10, "thickness": 1}
    d["splits"] = {"train": {"region": {"x": [0, 20]}, "per_class": 1}}
    (tmp_path / SPEC).write_text(dump(d))
    before = snapshot(tmp_path)
    generate(tmp_path / SPEC, tmp_path / "out", Options(progress=False))
    after = snapshot(tmp_path)
    assert {k for k in after if k not in before} == {k for k in after if k.startswith("out")}
    m = pd.read_parquet(tmp_path / "out" / "manifest")
    assert sorted(m["class_name"]) == sorted(["../../x", "?", "a/b"])
    assert all(f.startswith("images/train/train-") for f in m["file"])


def test_native_library_messages_are_silenced_only_during_a_command(tmp_path, capfd):
    # measured on main: OpenCV's own "[ WARN]"/"[ERROR]" lines (and libpng's) reached stderr
    # beside augsplit's one line
    both(sprites({"cls/bad.png": png_header_only(8, 8, body=b"\x78\x9c garbage")}), folder_objects())(tmp_path)
    level = cv2.utils.logging.getLogLevel()
    assert main(["plan", str(tmp_path / SPEC)]) == 2
    err = capfd.readouterr().err
    assert len(err.splitlines()) == 1 and "bad.png" in err
    # afterwards the process writes to its stderr as before, and OpenCV's settings are untouched
    os.write(2, b"native line\n")
    print("python line", file=sys.stderr)
    assert capfd.readouterr().err.splitlines() == ["native line", "python line"]
    assert cv2.utils.logging.getLogLevel() == level


def test_workers_are_capped_at_shards_and_cores(tmp_path, monkeypatch):
    # measured on main: 64 processes for a 2-shard job; --workers 100000 reached 4.4 GB
    from augsplit import executors
    from augsplit.generate import Options, generate

    seen = []

    def spy(task, jobs, workers, **_kw):  # the pool a run of local workers starts
        seen.append(workers)
        return executors.run_serial(task, jobs)

    monkeypatch.setattr(executors, "run_processes", spy)
    (tmp_path / SPEC).write_text(dump(BASE))  # 6 images: 2 shards of 4 and 2
    generate(tmp_path / SPEC, tmp_path / "out", Options(workers=64, shard_size=4, progress=False, executor="processes"))
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    assert seen == [min(2, cores)]


@pytest.mark.parametrize("extra", [{"range": [0, 1]}, {"dist": "log"}])
def test_an_axis_with_levels_and_a_range_or_dist_is_a_plan_warning(tmp_path, extra):
    # the range (or dist) was silently ignored; a warning (an error under --strict), not a refusal,
    # so the datasets already made from such specs still open
    from specs import spec_dict, write_spec

    from augsplit.build import open_spec
    from augsplit.cli import main

    d = spec_dict(axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "angle": {"levels": [0, 5], **extra}})
    spec = write_spec(tmp_path, d)
    assert [w.code for w in open_spec(spec).plan.warnings if w.axes == ("angle",)] == ["range_ignored"]
    assert main(["generate", str(spec), "--out", str(tmp_path / "ds"), "--strict", "--quiet"]) == 2
    assert main(["generate", str(spec), "--out", str(tmp_path / "ds"), "--quiet"]) == 0
    assert main(["verify", str(tmp_path / "ds"), "--quiet"]) == 0
