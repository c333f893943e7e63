"""Helpers shared by tests (import as `from specs import ...`): small in-memory specs, spec
files, and comparing dataset folders byte for byte."""

from __future__ import annotations

import copy
from pathlib import Path

import yaml

BASE = {
    "seed": 1,
    "canvas": {"width": 64, "height": 64, "mode": "gray"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 4},
    "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}},
    "splits": {"train": {"region": {"x": [0, 20]}, "per_class": 4},
               "test": {"region": {"x": [44, 64]}, "per_class": 2}},
}


def spec_dict(**changes) -> dict:
    """A copy of BASE with top-level keys replaced."""
    d = copy.deepcopy(BASE)
    d.update(copy.deepcopy(changes))
    return d


# A small RGB spec whose images depend on their render stream (noise background), for loader
# tests: a 24 x 20 canvas, a train and a test split apart along x.
LOADER = spec_dict(canvas={"width": 24, "height": 20, "mode": "rgb"},
                   objects={"kind": "polyomino", "cells": 3, "cell_px": 3},
                   background={"kind": "uniform_noise", "lo": 0.1, "hi": 0.5},
                   axes={"x": {"range": [4, 20]}, "y": {"range": [4, 16]}, "angle": {"range": [0, 360]}},
                   splits={"train": {"region": {"x": [4, 10]}, "per_class": 3},
                           "test": {"region": {"x": [14, 20]}, "per_class": 2}})


def lanes_dataset(out: Path, per_class: int, store: str = "none") -> Path:
    """A generated dataset of the default spec: train at x in [0, 20], test at [44, 64]."""
    from augsplit.build import open_mapping
    from augsplit.generate import Options, generate

    built = open_mapping(spec_dict(splits={"train": {"region": {"x": [0, 20]}, "per_class": per_class},
                                           "test": {"region": {"x": [44, 64]}, "per_class": per_class}}))
    generate(None, out, Options(progress=False, store=store), built=built)
    return out


def write_spec(folder: Path, spec: dict) -> Path:
    """The spec as a YAML file in `folder`, keys in their given order (order decides draws)."""
    p = Path(folder) / "spec.yaml"
    p.write_text(yaml.safe_dump(spec, sort_keys=False))
    return p


def tree(root: Path) -> dict[str, bytes]:
    """Every file under root (relative path -> bytes)."""
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(Path(root).rglob("*")) if p.is_file()}


def assert_same_tree(a: Path, b: Path) -> None:
    """Two folders hold the same files with the same bytes."""
    ta, tb = tree(a), tree(b)
    assert sorted(ta) == sorted(tb)
    differ = [k for k in ta if ta[k] != tb[k]]
    assert not differ, f"files differ: {differ[:5]}"


def snapshot(root: Path) -> dict[str, str]:
    """Everything under root, folders and symbolic links included: relative path -> 'dir',
    'link -> target' or the SHA-256 of the file's bytes (a checksum of the whole tree)."""
    import hashlib
    import os

    out = {}
    for dirpath, dirnames, filenames in os.walk(root):
        for name in dirnames + filenames:
            p = Path(dirpath) / name
            rel = str(p.relative_to(root))
            if p.is_symlink():
                out[rel] = f"link -> {os.readlink(p)}"
            elif p.is_dir():
                out[rel] = "dir"
            elif p.is_file():
                out[rel] = hashlib.sha256(p.read_bytes()).hexdigest()
            else:
                out[rel] = "special"
    return out


def refusal_line(code: int, err: str, expected_code: int, says=()) -> str:
    """The one stderr line of a refused command, checked: no traceback, exactly one line
    starting with 'augsplit', the expected exit code, and each of `says` in it."""
    lines = err.splitlines()
    assert "Traceback" not in err, err[-2000:]
    assert len(lines) == 1, f"expected one stderr line, got {len(lines)}: {err[:2000]}"
    line = lines[0]
    assert code == expected_code, line
    assert line.startswith("augsplit"), line
    for text in says:
        assert text in line, line
    return line
