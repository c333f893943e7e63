"""Every augsplit albumentations transform saves and reloads as albumentations users expect.

Outside reference: albumentations 2.0's own serialization (A.to_dict / A.from_dict,
A.save / A.load as JSON and YAML), the standard library's pickle, and A.ReplayCompose's
replay. A reloaded pipeline must give the same pixels and applied parameters as the
original for the same seed, from any working folder.
"""

from __future__ import annotations

import inspect
import os
import pickle

import albumentations as A
import numpy as np
import pytest
from specs import write_spec

import augsplit.albu as albu
from augsplit.albu import HeldOutPlacement, RegionColour, RegionPlacement
from augsplit.build import open_mapping, open_spec
from augsplit.errors import SpecError

SPEC = {"seed": 11, "canvas": {"width": 48, "height": 48},
        "objects": {"kind": "polyomino", "cells": 2, "cell_px": 3},
        "axes": {"x": {"range": [8, 40]}, "y": {"range": [8, 40]}, "scale": {"range": [0.5, 1.0]},
                 "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}, "saturation": {"range": [0.5, 1.0]}},
        "splits": {"train": {"region": {"x": [8, 20]}, "count": 10}, "test": {"region": {"x": [28, 40]}, "count": 10}}}

# (class, keyword arguments) of every transform the module defines
MADE = {
    RegionPlacement: {"split": "train", "content_size": (16, 16), "fill": (7, 7, 7), "params_key": "where"},
    HeldOutPlacement: {"split": "test", "content_size": (16, 16), "item_key": "item", "epoch": 2},
    RegionColour: {"split": "train", "p": 0.75},
}


def test_every_transform_of_the_module_is_covered():
    defined = {c for _, c in inspect.getmembers(albu, inspect.isclass)
               if issubclass(c, A.BasicTransform) and c.__module__ == albu.__name__}
    assert defined == set(MADE)


@pytest.fixture
def spec_dir(tmp_path, monkeypatch):
    folder = tmp_path / "specs"
    folder.mkdir()
    write_spec(folder, SPEC)
    (tmp_path / "elsewhere").mkdir()
    monkeypatch.chdir(folder)  # the transforms are made with the relative path "spec.yaml"
    return tmp_path


def _images(n=6):
    rng = np.random.default_rng(4)
    return [rng.integers(0, 256, (16, 16, 3), dtype=np.uint8) for _ in range(n)]


def _run(pipeline, seed=3):
    pipeline.set_random_seed(seed)
    out = []
    for i, img in enumerate(_images()):
        r = pipeline(image=img, item=i)
        out.append((r["image"], {k: v for k, v in r.items() if k not in ("image", "item")}))
    return out


def _equal(a, b) -> bool:
    """==, with NaN equal to NaN (the placement reports x_deg as NaN without viewing geometry)."""
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(_equal(a[k], b[k]) for k in a)
    return a == b or (a != a and b != b)


def _same(a, b):
    assert len(a) == len(b)
    for (ia, pa), (ib, pb) in zip(a, b):
        assert np.array_equal(ia, ib) and _equal(pa, pb)


def _dict(c, tmp):
    return A.from_dict(A.to_dict(c))


def _json(c, tmp):
    A.save(c, str(tmp / "pipeline.json"))
    os.chdir(tmp / "elsewhere")
    return A.load(str(tmp / "pipeline.json"))


def _yaml(c, tmp):
    A.save(c, str(tmp / "pipeline.yaml"), data_format="yaml")
    os.chdir(tmp / "elsewhere")
    return A.load(str(tmp / "pipeline.yaml"), data_format="yaml")


def _pickle(c, tmp):
    data = pickle.dumps(c)
    os.chdir(tmp / "elsewhere")
    return pickle.loads(data)


@pytest.mark.parametrize("how", [_dict, _json, _yaml, _pickle], ids=["dict", "json", "yaml", "pickle"])
@pytest.mark.parametrize("cls", list(MADE), ids=lambda c: c.__name__)
def test_saved_and_reloaded_gives_the_same_output(spec_dir, cls, how):
    made = A.Compose([cls("spec.yaml", **MADE[cls])])
    want = _run(made)
    loaded = how(made, spec_dir)
    t = loaded.transforms[0]
    assert type(t) is cls
    assert t.spec == str(spec_dir / "specs" / "spec.yaml")  # kept absolute: found after the cd
    assert t.p == made.transforms[0].p and t.epoch == made.transforms[0].epoch
    _same(_run(loaded), want)


@pytest.mark.parametrize("cls", list(MADE), ids=lambda c: c.__name__)
def test_replay_gives_the_same_output(spec_dir, cls):
    rc = A.ReplayCompose([cls("spec.yaml", **MADE[cls])])
    rc.set_random_seed(5)
    imgs = _images()
    outs = [rc(image=img, item=i) for i, img in enumerate(imgs)]
    os.chdir(spec_dir / "elsewhere")  # the replay record names the spec by its absolute path
    for i, (img, out) in enumerate(zip(imgs, outs)):
        record = out["replay"]["transforms"][0]
        again = A.ReplayCompose.replay(out["replay"], image=img, item=i)
        assert np.array_equal(again["image"], out["image"])
        if record["applied"]:
            assert not np.array_equal(out["image"], img)
    assert sum(o["replay"]["transforms"][0]["applied"] for o in outs) >= 1


def test_a_built_spec_is_embedded_and_reloads_anywhere(spec_dir):
    built = open_mapping(SPEC, base_dir=spec_dir)
    made = A.Compose([RegionPlacement(built, "train", content_size=(16, 16))])
    want = _run(made)
    kept = made.transforms[0].spec
    assert set(kept) == {"spec", "base_dir"} and kept["base_dir"] == str(spec_dir.resolve())
    loaded = _json(made, spec_dir)
    assert loaded.transforms[0]._built.plan.hash == built.plan.hash
    _same(_run(loaded), want)
    # the embedded form is also what `spec` accepts, and a spec file gives the same plan
    assert RegionColour(kept, "train")._built.plan.hash == open_spec(spec_dir / "specs" / "spec.yaml").plan.hash


def test_held_out_placement_keeps_p_one(spec_dir):
    assert HeldOutPlacement("spec.yaml", "test", content_size=(8, 8), p=1).p == 1.0
    with pytest.raises(SpecError, match="HeldOutPlacement.p: a held-out placement applies to every test item"):
        HeldOutPlacement("spec.yaml", "test", content_size=(8, 8), p=0.5)
    with pytest.raises(SpecError, match="spec must be a spec file path, a Built or an embedded spec"):
        RegionColour(42, "train")
