"""Holdout kinds look at every axis, the class included; auto_guard removes only the band the
planner's own proof needs.

Kinds follow the generalisation literature's definitions (e.g. Schott et al., "Visual
representation learning does not generalize strongly within the same domain", ICLR 2022;
Hupkes et al., "Compositionality decomposed", JAIR 2020): a composition split combines
values every one of which training has seen; a value training never shows, on a nominal axis
such as the class, lies outside the training support (extrapolation), not between seen values.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from specs import write_spec

import augsplit
from augsplit.build import open_mapping
from augsplit.errors import GuaranteeError
from augsplit.plan.draw import draw
from augsplit.render import RenderParams, footprint

ROOT = Path(augsplit.__file__).resolve().parents[1]  # the CLI runs the package under test
STEP = 1.0 / 16.0  # the auto_guard grid (plan/guard.py GUARD_STEP_PX), restated: a guard is a multiple of it


def _sprites(folder: Path, shapes: dict[str, tuple[int, int]]) -> str:
    """A sprite folder with one opaque white rectangle (h, w) per class."""
    for name, (h, w) in shapes.items():
        (folder / name).mkdir(parents=True, exist_ok=True)
        cv2.imwrite(str(folder / name / "0.png"), np.full((h, w, 3), 255, np.uint8))
    return str(folder)


# ---- kinds ------------------------------------------------------------------------------------


def _class_holdout(folder, kind=None):
    test = {"region": {"class": ["short"]}, "per_class": 3}
    if kind:
        test["kind"] = kind
    return {"seed": 1, "canvas": {"width": 64, "height": 64},
            "objects": {"kind": "folder", "path": _sprites(folder, {"long": (3, 15), "short": (3, 6)})},
            "axes": {"x": {"range": [16, 48]}, "y": {"range": [16, 48]}},
            "splits": {"train": {"region": {"class": ["long"]}, "per_class": 3}, "test": test}}


def test_a_class_training_never_shows_is_not_composition(tmp_path):
    plan = open_mapping(_class_holdout(tmp_path)).plan
    test = plan.split("test")
    assert test.kind == "extrapolation"
    # reference: the drawn classes of the two splits share nothing
    tr, te = (set(draw(plan, s, np.arange(s.total))["class_index"].tolist()) for s in plan.splits)
    assert not tr & te


def test_a_false_composition_claim_is_refused_with_the_classes(tmp_path):
    p = write_spec(tmp_path, _class_holdout(tmp_path / "sprites", kind="composition"))
    r = subprocess.run([sys.executable, "-m", "augsplit.cli", "plan", str(p)], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
    assert "splits.test.kind" in r.stderr and "class short never is" in r.stderr and "training has class long" in r.stderr


def test_composition_still_holds_when_every_class_and_position_is_seen(tmp_path):
    # class x position: each class trains on its own half, tests on the other (both marginals seen)
    spec = _class_holdout(tmp_path)
    spec["splits"] = {"train": {"region": {"by_class": {"long": {"x": [16, 30]}, "short": {"x": [34, 48]}}}, "per_class": 3},
                      "test": {"region": {"by_class": {"long": {"x": [34, 48]}, "short": {"x": [16, 30]}}}, "per_class": 3,
                               "kind": "composition"}}
    assert open_mapping(spec).plan.split("test").kind == "composition"


def test_plan_text_and_json_name_the_unseen_class(tmp_path):
    from augsplit.plan.describe import plan_data, plan_text

    plan = open_mapping(_class_holdout(tmp_path)).plan
    assert "never seen in training: class short" in plan_text(plan)
    assert plan_data(plan)["splits"][1]["evidence"]["unseen"]["class"] == ["short"]


# ---- auto_guard: the two cases that removed everything -------------------------------------------


def _line_spec(folder, test_y, auto):
    # a 41 px line, turned at most 3 degrees: across it, a gap of about 3 px separates two lanes
    return {"seed": 1, "canvas": {"width": 128, "height": 64, "mode": "gray"},
            "objects": {"kind": "folder", "path": _sprites(folder, {"line": (1, 41)})},
            "axes": {"x": {"range": [30, 98]}, "y": {"range": [0, 64]}, "angle": {"range": [-3, 3]}},
            "splits": {"train": {"region": {"y": [10, 30]}, "per_class": 4}, "test": {"region": {"y": test_y}, "per_class": 4}},
            "guarantees": [{"disjoint": "footprint", "between": ["train", "test"], "auto_guard": auto}]}


def test_auto_guard_keeps_what_a_3_px_gap_proves_for_a_thin_line(tmp_path):
    gap = 49 * STEP  # 3.0625 px
    proved = open_mapping(_line_spec(tmp_path, [30 + gap, 54], False)).plan
    assert proved.verdicts[0].status == "proved"  # the planner proves this gap enough ...
    built = open_mapping(_line_spec(tmp_path, [30, 54], True))  # ... so auto_guard keeps that part
    (v,) = built.plan.verdicts
    assert v.status == "guarded" and v.numbers["guard_px"] <= gap
    test = built.plan.split("test").region
    assert (proved.split("test").region - test).mass() == pytest.approx(0, abs=1e-12)
    lo, _ = test.axis_extent("y")
    assert lo <= 30 + gap + 1e-9
    # reference: the renderer's footprints of the kept lane's nearest placements and the
    # training lane's farthest ones share no pixel
    line = built.source.sprite(0, 0)
    hw = (64, 128)
    cov = np.zeros(hw, bool)
    for x in np.linspace(30, 98, 35):
        for a in (-3.0, 0.0, 3.0):
            f = footprint(line, RenderParams(x, 30.0, 1.0, a), hw)
            if f.footprint_px:
                x0, y0, x1, y1 = f.bbox
                cov[y0:y1, x0:x1] |= f.mask
    for x in np.linspace(30, 98, 35):
        for a in (-3.0, 0.0, 3.0):
            f = footprint(line, RenderParams(x, lo, 1.0, a), hw)
            x0, y0, x1, y1 = f.bbox
            assert not (cov[y0:y1, x0:x1] & f.mask).any()


def test_auto_guard_keeps_an_opposite_sector_when_training_reaches_the_centre(tmp_path):
    def spec(test_ecc, auto):
        return {"seed": 2, "canvas": {"width": 96, "height": 96},
                "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
                "axes": {"eccentricity": {"range": [0, 40]}, "polar_angle": {"range": [0, 360]}},
                "splits": {"train": {"region": {"eccentricity": [0, 20], "polar_angle": [0, 90]}, "per_class": 4},
                           "test": {"region": {"eccentricity": test_ecc, "polar_angle": [180, 270]}, "per_class": 4}},
                "guarantees": [{"disjoint": "footprint", "between": ["train", "test"], "auto_guard": auto}]}

    # every point of the opposite quadrant is as far from the training quadrant as from the
    # centre (the angle between them is at least 90 degrees), so "g px away" is eccentricity >= g
    g = 16.0
    far = open_mapping(spec([g, 40], False)).plan
    assert far.verdicts[0].ok
    built = open_mapping(spec([0, 40], True))
    assert built.plan.verdicts[0].status == "guarded"
    kept = built.plan.split("test").region
    assert (far.split("test").region - kept).mass() == pytest.approx(0, abs=1e-12)
    assert kept.mass() > 0.5 * far.split("test").region.mass()


# ---- auto_guard: any translation spec -------------------------------------------------------------


def _clip(a, b):
    return [max(a, 0.0), min(b, 64.0)]


@st.composite
def translation_specs(draw_):
    cells = draw_(st.sampled_from([2, 3, 4]))
    cell_px = draw_(st.sampled_from([2, 3, 4]))
    axes = {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}}
    if draw_(st.booleans()):
        lo = draw_(st.floats(0.7, 1.2))
        axes["scale"] = {"range": [round(lo, 3), round(lo * draw_(st.floats(1.01, 1.5)), 3)]}
    turn = draw_(st.integers(0, 180))
    if turn:
        axes["angle"] = {"range": [-turn, turn]}

    def span(lo_min, lo_max):
        lo = draw_(st.integers(lo_min, lo_max))
        return [lo, min(64, lo + draw_(st.integers(4, 40)))]

    # the test rectangle starts near where the training one ends (overlapping it, touching it
    # or a little apart), along x, y or both, so that auto_guard has work to do
    ax, ay = span(0, 36), span(0, 36)
    bx, by = span(0, 56), span(0, 56)
    for along in draw_(st.sampled_from([("x",), ("y",), ("x", "y")])):
        a, b = (ax, bx) if along == "x" else (ay, by)
        lo = max(0, min(56, a[1] + draw_(st.integers(-12, 12))))
        b[:] = [lo, min(64, lo + draw_(st.integers(4, 40)))]
    g = draw_(st.integers(0, 30 * 16)) * STEP
    return {"seed": 5, "canvas": {"width": 64, "height": 64, "mode": "gray"},
            "objects": {"kind": "polyomino", "cells": cells, "cell_px": cell_px},
            "axes": axes,
            "splits": {"train": {"region": {"x": ax, "y": ay}, "per_class": 2},
                       "test": {"region": {"x": bx, "y": by}, "per_class": 2}},
            "guarantees": [{"disjoint": "footprint", "between": ["train", "test"], "auto_guard": True}]}, g, (ax, ay)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.filter_too_much, HealthCheck.too_slow])
@given(translation_specs())
def test_auto_guard_keeps_every_part_a_proved_gap_keeps(case):
    spec, g, (ax, ay) = case
    # the test region's part g px away from the training positions (each side grown by g)
    away = dict(spec)
    away["splits"] = dict(spec["splits"], test=dict(spec["splits"]["test"]))
    away["splits"]["test"]["region"] = dict(spec["splits"]["test"]["region"],
                                            minus={"x": _clip(ax[0] - g, ax[1] + g), "y": _clip(ay[0] - g, ay[1] + g)})
    away["guarantees"] = [{"disjoint": "footprint", "between": ["train", "test"]}]
    try:
        proved = open_mapping(away, strict=False).plan
    except Exception as exc:  # noqa: BLE001 - the part g px away may be empty: nothing to keep
        assume("empty" not in str(exc) and "no class" not in str(exc))
        raise
    assume(proved.verdicts[0].ok)
    try:
        guarded = open_mapping(spec).plan
    except GuaranteeError as exc:
        pytest.fail(f"auto_guard refused a spec whose part {g} px away is proved: {exc}")
    assert guarded.verdicts[0].ok
    kept = guarded.split("test").region
    assert (proved.split("test").region - kept).mass() == pytest.approx(0, abs=1e-12)
