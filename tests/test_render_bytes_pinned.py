"""Rendering speed-ups keep the bytes: scenes (with and without distractors, with and without
no_overlap, every background kind) and the backgrounds alone, as the package drew them at
the pinned commit REF, before the rendering path was made faster.

The reference is the package itself at REF (`git archive`, as tests/bench/sidebyside.export
does), run in a fresh interpreter in this environment, so the comparison holds whatever
OpenCV build is installed. Each side prints one sha256 per image over its pixels and its
distractor rows; the lists must be equal.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
REF = "2931983"  # main before the distractor and noise speed-ups (issue 14, outcomes 5 and 9)

# "spectrum" was the default synthesis at REF: datasets made then name it in their stored spec
BACKGROUNDS = [{"kind": "solid", "value": 0.3}, {"kind": "pink_noise", "mean": 0.5, "contrast": 0.2, "synthesis": "spectrum"},
               {"kind": "pink_noise", "mean": 0.4, "contrast": 0.3, "exponent": 1.7, "per_channel": True,
                "synthesis": "spectrum"},
               {"kind": "pink_noise", "mean": 0.5, "contrast": 0.2, "synthesis": "white"},
               {"kind": "gaussian_noise", "mean": 0.5, "sd": 0.1}, {"kind": "uniform_noise"}]
CASES = [  # (distractor count, no_overlap, attempts, mode, canvas width x height)
    ([0, 0], False, 50, "rgb", (64, 48)), ([5, 5], False, 50, "rgb", (64, 64)), ([5, 5], True, 50, "rgb", (64, 64)),
    ([0, 4], False, 50, "gray", (61, 64)), ([2, 8], True, 3, "gray", (64, 64)), ([1, 3], True, 1, "rgb", (33, 65)),
]

SCRIPT = r"""
import hashlib, json, sys
import numpy as np
from augsplit.build import open_mapping
from augsplit.plan.draw import draw
from augsplit.scene import make_scene

out = []
for spec in json.loads(sys.stdin.read()):
    built = open_mapping(spec)
    plan = built.plan
    for split in plan.splits:
        cols = draw(plan, split, np.arange(sum(split.counts)))
        rows = [{k: v[i] for k, v in cols.items()} for i in range(len(cols["index"]))]
        if sys.argv[1] == "batch":  # as generate renders them: a row group at a time
            import augsplit.scene as scene_module
            scene_module.SCENE_BATCH_ROWS = 7  # several batches per split, the last one short
            make_scenes = scene_module.make_scenes
            scenes = make_scenes(plan, built.source, built.background, split, rows)
        else:
            scenes = (make_scene(plan, built.source, built.background, split, row) for row in rows)
        for s in scenes:
            h = hashlib.sha256(np.ascontiguousarray(s.image).tobytes())
            h.update(repr([sorted((k, repr(v.item() if hasattr(v, "item") else v)) for k, v in d.items())
                           for d in s.distractors]).encode())
            out.append(h.hexdigest())
print(json.dumps(out))
import augsplit
print(augsplit.__file__, file=sys.stderr)
"""


def _spec(background, count, no_overlap, attempts, mode, wh) -> dict:
    return {"seed": 11, "canvas": {"width": wh[0], "height": wh[1], "mode": mode},
            "objects": {"kind": "polyomino", "cells": 4, "cell_px": 4},
            "background": background,
            "render": {"distractors": {"count": count, "no_overlap": no_overlap, "attempts": attempts}},
            "axes": {"x": {"range": [6, 28]}, "y": {"range": [6, 28]}, "scale": {"range": [0.7, 1.6], "dist": "log"},
                     "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}, "mirror": {"levels": [0, 1]}},
            "splits": {"train": {"region": {"x": [6, 16]}, "per_class": 4},
                       "test": {"region": {"x": [18, 28]}, "per_class": 2}}}


SPECS = [_spec(bg, *case) for case in CASES for bg in BACKGROUNDS]


def _hashes(tree: Path, how: str = "row") -> list[str]:
    env = dict(os.environ, PYTHONPATH=str(tree), MPLBACKEND="Agg")
    # -P: the working folder is not put on the path (it may hold another tree's augsplit)
    r = subprocess.run([sys.executable, "-P", "-c", SCRIPT, how], input=json.dumps(SPECS), env=env, capture_output=True,
                       text=True, timeout=600)
    assert f"{tree}/augsplit/" in r.stderr.splitlines()[-1], r.stderr[-2000:]
    assert r.returncode == 0, r.stderr[-2000:]
    return json.loads(r.stdout)


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> list[str]:
    try:
        archive = subprocess.run(["git", "-C", str(ROOT), "archive", REF, "augsplit"], check=True,
                                 capture_output=True).stdout
    except (OSError, subprocess.CalledProcessError):
        pytest.skip(f"the reference commit {REF} is not in this checkout's git history")
    dest = Path(tempfile.mkdtemp(dir=tmp_path_factory.mktemp("ref")))
    subprocess.run(["tar", "-x", "-C", str(dest)], input=archive, check=True)
    return _hashes(dest)


@pytest.mark.parametrize("how", ["row", "batch"])
def test_scenes_have_the_bytes_the_pinned_commit_gave(reference, how):
    # row: make_scene per row, as loaders re-render; batch: make_scenes, as generate renders
    got = _hashes(ROOT, how)
    assert len(got) == len(reference) > 500
    differ = [i for i, (a, b) in enumerate(zip(got, reference)) if a != b]
    assert not differ, f"{len(differ)} of {len(got)} scenes differ from {REF}, the first at {differ[:5]}"
