"""Plan-time warnings: the shipped specs raise none and render what their comments say; each
kind of warning fires on a deliberately bad spec, and its numbers agree with a direct
computation (the renderer's own footprint and visible fraction, rendered pixels, or the
planner's draws), never with the warning code's own helpers.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import cv2
import numpy as np
import pytest
from specs import spec_dict, write_spec

import augsplit
from augsplit.build import open_mapping, open_spec
from augsplit.plan.draw import draw
from augsplit.render import RenderParams, footprint
from augsplit.scene import make_scene, render_params
from augsplit.spec import builtin_spec_path

# the configs that ship with the package under test
ROOT = Path(augsplit.__file__).resolve().parents[1]
SHIPPED = sorted((ROOT / "configs").glob("*.yaml")) + [builtin_spec_path("demo")]
IDS = [p.stem for p in SHIPPED]


def _rows(plan, split):
    cols = draw(plan, split, np.arange(split.total))
    return [dict(zip(cols, vals)) for vals in zip(*(cols[k].tolist() for k in cols))]


def _visible(built, split):
    """The renderer's visible fraction of every image of a split (target object only)."""
    thr = built.spec.render.alpha_threshold
    hw = (built.spec.canvas.height, built.spec.canvas.width)
    return np.array([footprint(built.source.sprite(r["class_index"], r["instance"]), render_params(r), hw, thr).visible_fraction
                     for r in _rows(built.plan, split)])


# ---- the shipped specs -----------------------------------------------------------------------


@pytest.mark.parametrize("path", SHIPPED, ids=IDS)
def test_every_shipped_spec_renders_every_object_whole(path):
    # per_class_placement rendered 61% of its images with no object at all; the other specs
    # clipped objects at their range ends. Reference: the renderer's own visible fraction.
    built = open_spec(path)
    for s in built.plan.splits:
        vf = _visible(built, s)
        assert vf.min() == 1.0, f"{path.name} {s.name}: {np.mean(vf < 1):.0%} of images clipped, min {vf.min():.2f}"


@pytest.mark.parametrize("path", SHIPPED, ids=IDS)
def test_every_shipped_spec_plans_without_warnings(path):
    assert open_spec(path).plan.warnings == ()
    r = subprocess.run([sys.executable, "-m", "augsplit.cli", "plan", str(path), "--strict"], capture_output=True,
                       text=True, cwd=ROOT)
    assert r.returncode == 0 and "warning" not in r.stdout + r.stderr, r.stdout + r.stderr


@pytest.mark.parametrize("path", SHIPPED, ids=IDS)
def test_every_colour_axis_of_a_shipped_spec_changes_pixels(path):
    # composition_cells turned the hue of white tiles: no pixel changed. Reference: two
    # renderings of the same image, the colour axis at its two range ends.
    built = open_spec(path)
    colour = [ax for ax in built.plan.space.axes if ax.name in ("hue", "saturation", "brightness")]
    split = built.plan.splits[0]
    row = _rows(built.plan, split)[0]
    for ax in colour:
        lo, hi = ax.lo, (ax.lo + ax.hi) / 2 if ax.circular else ax.hi
        a = make_scene(built.plan, built.source, built.background, split, dict(row, **{ax.name: lo})).image
        b = make_scene(built.plan, built.source, built.background, split, dict(row, **{ax.name: hi})).image
        assert np.abs(a.astype(int) - b.astype(int)).max() > 0, f"{path.name}: {ax.name} changes no pixel"


# ---- off the canvas ----------------------------------------------------------------------------


def _off(built, split=None):
    ws = [w for w in built.plan.warnings if w.code == "off_canvas" and (split is None or w.split == split)]
    return ws[0] if ws else None


def _render_worst(built, w):
    """Reference: the renderer's visible fraction of the reported worst placement."""
    n = w.numbers
    c = built.plan.classes.index(n["class"])
    p = n["placement"]
    params = RenderParams(p["cx_px"], p["cy_px"], p["scale"], p["angle"], p["mirror"])
    hw = (built.spec.canvas.height, built.spec.canvas.width)
    return footprint(built.source.sprite(c, n["instance"]), params, hw, built.spec.render.alpha_threshold).visible_fraction


def test_off_canvas_reports_the_least_visible_fraction_of_a_translation_range():
    spec = spec_dict(axes={"x": {"range": [1, 70]}, "y": {"range": [10, 54]}, "angle": {"range": [0, 360]},
                           "scale": {"range": [1.0, 1.6]}},
                     splits={"train": {"region": {"x": [1, 20]}, "per_class": 40},
                             "test": {"region": {"x": [30, 40]}, "per_class": 10}})
    built = open_mapping(spec)
    w = _off(built, "train")
    assert w is not None and _off(built, "test") is None  # the test range keeps objects whole
    assert w.split == "train" and w.axes[0] == "x" and "left" in w.numbers["edges"]
    f = w.numbers["least_visible_fraction"]
    assert 0 < f < 0.75 and "partly off the canvas" in w.message
    # the rendered worst placement shows that fraction (sub-cell estimate vs pixel count:
    # within the share of one object's boundary pixels)
    assert _render_worst(built, w) == pytest.approx(f, abs=0.06)
    # and no drawn image shows less (a sampled minimum of the region, so drawn images show more)
    assert _visible(built, built.plan.split("train")).min() >= f - 0.06


def test_off_canvas_says_wholly_for_the_old_per_class_placement_geometry():
    # the per-class config as shipped before: at 57 cm and 40 px/cm, 1 deg is about 40 px
    spec = {"seed": 404, "canvas": {"width": 96, "height": 96}, "viewing": {"distance_cm": 57, "px_per_cm": 40},
            "objects": {"kind": "polyomino", "cells": 4, "cell_px": 4},
            "axes": {"eccentricity": {"range": [1.0, 2.5], "unit": "deg"}, "angle": {"range": [0, 360]}},
            "splits": {"train": {"per_class": 20}}}
    built = open_mapping(spec)
    w = _off(built, "train")
    assert w.numbers["least_visible_fraction"] == 0 and "wholly" in w.message and w.axes == ("eccentricity",)
    assert _render_worst(built, w) == 0.0
    vf = _visible(built, built.plan.split("train"))
    assert (vf == 0).mean() > 0.3  # most of the range lies off a 96 px canvas


def test_off_canvas_names_scale_when_only_size_overflows():
    # no position axis: every object sits at the centre, and the largest scale outgrows the canvas
    spec = spec_dict(canvas={"width": 32, "height": 32, "mode": "gray"}, axes={"scale": {"range": [1.0, 3.0]}},
                     splits={"train": {"per_class": 4}})
    w = _off(open_mapping(spec), "train")
    assert w.axes == ("scale",) and w.numbers["placement"]["scale"] == pytest.approx(3.0)
    assert _render_worst(open_mapping(spec), w) == pytest.approx(w.numbers["least_visible_fraction"], abs=0.06)


def test_keep_inside_silences_the_off_canvas_warning():
    spec = spec_dict(axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
                     render={"keep_inside": True})
    assert _off(open_mapping(spec)) is None


# ---- colour axes ----------------------------------------------------------------------------


def _colour_warning(built, axis):
    return [w for w in built.plan.warnings if w.code == "colour_no_effect" and w.axes == (axis,)]


def _two_renderings(built, axis, a, b):
    split = built.plan.splits[0]
    row = _rows(built.plan, split)[0]
    one = make_scene(built.plan, built.source, built.background, split, dict(row, **{axis: a})).image
    two = make_scene(built.plan, built.source, built.background, split, dict(row, **{axis: b})).image
    return one, two


@pytest.mark.parametrize("axis, rng, values", [("hue", [0, 360], (0.0, 137.0)),
                                               ("saturation", [0.2, 1.0], (0.2, 1.0)),
                                               ("brightness", [1.0, 2.0], (1.0, 2.0))])
def test_colour_axis_on_white_objects_warns_and_changes_no_pixel(axis, rng, values):
    spec = spec_dict(canvas={"width": 64, "height": 64, "mode": "rgb"},
                     axes={"x": {"range": [20, 44]}, "y": {"range": [20, 44]}, axis: {"range": rng}},
                     splits={"train": {"per_class": 2}})
    built = open_mapping(spec)
    assert _colour_warning(built, axis), built.plan.warnings
    a, b = _two_renderings(built, axis, *values)
    assert np.array_equal(a, b)  # reference: the rendered pixels


@pytest.mark.parametrize("axis, rng, values", [("hue", [0, 360], (0.0, 137.0)),
                                               ("saturation", [0.2, 1.0], (0.2, 1.0)),
                                               ("brightness", [0.5, 1.0], (0.5, 1.0))])
def test_colour_axis_on_coloured_objects_does_not_warn_and_changes_pixels(axis, rng, values):
    spec = spec_dict(canvas={"width": 64, "height": 64, "mode": "rgb"},
                     objects={"kind": "polyomino", "cells": 3, "cell_px": 4, "colour": [200, 120, 40]},
                     axes={"x": {"range": [20, 44]}, "y": {"range": [20, 44]}, axis: {"range": rng}},
                     splits={"train": {"per_class": 2}})
    built = open_mapping(spec)
    assert not _colour_warning(built, axis)
    a, b = _two_renderings(built, axis, *values)
    assert not np.array_equal(a, b)


def test_colour_check_looks_at_every_instance_of_a_sprite_folder(tmp_path):
    # one grey instance and one red one: hue acts on the red one, so no warning
    for cls, colours in {"a": [(128, 128, 128), (200, 30, 30)], "b": [(90, 90, 90)]}.items():
        (tmp_path / cls).mkdir()
        for i, c in enumerate(colours):
            cv2.imwrite(str(tmp_path / cls / f"{i}.png"), np.full((6, 6, 3), c[::-1], np.uint8))
    spec = spec_dict(canvas={"width": 64, "height": 64, "mode": "rgb"}, objects={"kind": "folder", "path": str(tmp_path)},
                     axes={"x": {"range": [20, 44]}, "y": {"range": [20, 44]}, "hue": {"range": [0, 360]}},
                     splits={"train": {"per_class": 2}})
    assert not _colour_warning(open_mapping(spec), "hue")
    (tmp_path / "a" / "1.png").unlink()
    assert _colour_warning(open_mapping(spec), "hue")


# ---- axes and classes --------------------------------------------------------------------------


def test_an_axis_with_one_value_in_every_split_warns():
    spec = spec_dict(axes={"x": {"range": [20, 44]}, "y": {"range": [20, 44]}, "scale": {"levels": [1.0, 1.5]}},
                     splits={"train": {"region": {"scale": 1.5}, "per_class": 3},
                             "test": {"region": {"scale": 1.5, "x": [30, 44]}, "per_class": 3}})
    built = open_mapping(spec)
    (w,) = [w for w in built.plan.warnings if w.code == "axis_constant"]
    assert w.axes == ("scale",) and w.numbers["value"] == 1.5
    # reference: the draws of every split take that one value
    assert {float(v) for s in built.plan.splits for v in draw(built.plan, s, np.arange(s.total))["scale"]} == {1.5}


def test_an_axis_held_out_by_level_does_not_warn():
    spec = spec_dict(axes={"x": {"range": [20, 44]}, "y": {"range": [20, 44]}, "scale": {"levels": [1.0, 1.5]}},
                     splits={"train": {"region": {"scale": 1.0}, "per_class": 3},
                             "test": {"region": {"scale": 1.5}, "per_class": 3}})
    assert not [w for w in open_mapping(spec).plan.warnings if w.code == "axis_constant"]


def test_a_class_in_no_split_warns():
    # four of the five tetrominoes get a region; the fifth is silently left out
    spec = spec_dict(objects={"kind": "polyomino", "cells": 4, "cell_px": 3},
                     axes={"x": {"range": [16, 48]}, "y": {"range": [16, 48]}},
                     splits={"train": {"region": {"by_class": {f"P4-0{k}": {} for k in range(4)}}, "per_class": 2}})
    built = open_mapping(spec)
    (w,) = [w for w in built.plan.warnings if w.code == "class_unused"]
    assert w.classes == ("P4-04",)
    # reference: the drawn class indices
    drawn = {int(c) for s in built.plan.splits for c in draw(built.plan, s, np.arange(s.total))["class_index"]}
    assert drawn == {0, 1, 2, 3}


def test_a_split_asking_for_a_class_its_region_lacks_warns():
    spec = spec_dict(axes={"x": {"range": [16, 48]}, "y": {"range": [16, 48]}},
                     splits={"train": {"region": {"class": "P3-00"}, "per_class": 2},
                             "again": {"region": {"split": "train"}, "classes": ["P3-00", "P3-01"], "per_class": 2},
                             "other": {"region": {"class": "P3-01"}, "per_class": 2}})
    built = open_mapping(spec)
    (w,) = [w for w in built.plan.warnings if w.code == "class_empty"]
    assert w.split == "again" and w.classes == ("P3-01",)
    s = built.plan.split("again")
    assert set(draw(built.plan, s, np.arange(s.total))["class_index"].tolist()) == {0}  # reference: the draws


def test_by_class_with_a_referenced_split_missing_the_class_warns():
    spec = spec_dict(axes={"x": {"range": [16, 48]}, "y": {"range": [16, 48]}},
                     splits={"train": {"region": {"class": "P3-00"}, "per_class": 2},
                             "test": {"region": {"by_class": {"P3-00": {"x": [16, 20]}, "P3-01": {"split": "train"}}},
                                      "per_class": 2},
                             "rest": {"region": {"class": "P3-01"}, "per_class": 1}})
    (w,) = [w for w in open_mapping(spec).plan.warnings if w.code == "class_empty"]
    assert w.split == "test" and w.classes == ("P3-01",)


# ---- where warnings show --------------------------------------------------------------------------

BAD = spec_dict(axes={"x": {"range": [-4, 68]}, "y": {"range": [20, 44]}, "hue": {"range": [0, 360]}},
                splits={"train": {"region": {"x": [-4, 20]}, "per_class": 6}, "test": {"region": {"x": [44, 68]}, "per_class": 3}})


def _cli(*args, cwd):
    return subprocess.run([sys.executable, "-m", "augsplit.cli", *map(str, args)], capture_output=True, text=True, cwd=cwd)


def test_plan_shows_warnings_in_text_and_json_and_strict_makes_them_errors(tmp_path):
    p = write_spec(tmp_path, BAD)
    r = _cli("plan", p, cwd=ROOT)
    assert r.returncode == 0 and "warning [off_canvas] split train" in r.stdout and "warning [colour_no_effect]" in r.stdout
    d = json.loads(_cli("plan", p, "--json", cwd=ROOT).stdout)
    codes = sorted(w["code"] for w in d["warnings"])
    assert codes == ["colour_no_effect", "off_canvas", "off_canvas"]
    off = [w for w in d["warnings"] if w["code"] == "off_canvas"]
    assert {w["split"] for w in off} == {"train", "test"} and all(w["axes"] == ["x"] for w in off)
    r = _cli("plan", p, "--strict", cwd=ROOT)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "--strict" in r.stderr and "3 plan warning(s)" in r.stderr


def test_generate_prints_warnings_and_counts_low_visibility_images(tmp_path):
    p = write_spec(tmp_path, BAD)
    out = tmp_path / "data"
    r = _cli("generate", p, "--out", out, "--store", "none", "--quiet", cwd=ROOT)
    assert r.returncode == 0, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.startswith("augsplit generate: warning: ")]
    assert sum("[off_canvas]" in ln for ln in lines) == 2 and sum("[colour_no_effect]" in ln for ln in lines) == 1
    summary = json.loads((out / "dataset.json").read_text())
    low = summary["low_visibility"]
    # reference: the manifest's own visible_fraction column
    import pandas as pd

    vf = pd.read_parquet(out / "manifest", columns=["visible_fraction"])["visible_fraction"].to_numpy()
    assert low == {"threshold": 0.5, "below": int((vf < 0.5).sum()), "zero": int((vf == 0).sum())}
    assert low["below"] > 0
    assert any(f"{low['below']} of {len(vf)} images show less than 50%" in ln for ln in lines)


def test_generate_strict_refuses_before_writing_anything(tmp_path):
    p = write_spec(tmp_path, BAD)
    r = _cli("generate", p, "--out", tmp_path / "data", "--strict", "--quiet", cwd=ROOT)
    assert r.returncode == 2 and "plan warning(s), errors under --strict" in r.stderr.splitlines()[-1]
    assert not (tmp_path / "data").exists()
