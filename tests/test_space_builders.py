"""Region builders as Python values equal the YAML forms the spec language builds (the YAML
interpreter calls them), and Region has value equality: the same set, however it is cut into
boxes, is equal and hashes alike; a different set is not equal."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from augsplit.errors import SpecError
from augsplit.plan.regions import build_region
from augsplit.space import Axis, Region, Space
from augsplit.space.axes import CIRCULAR, CLASS, LEVELS, LOG
from augsplit.space.builders import band, box, by_class, cells, of_classes

CLASSES = ("a", "b", "c")
SPACE = Space([Axis("x", 0, 10, unit="px"), Axis("scale", 0.5, 2.0, LOG), Axis("angle", 0, 360, CIRCULAR, "deg"),
               Axis(CLASS, 0, 2, LEVELS, "", (0.0, 1.0, 2.0))])


def yaml(node) -> Region:
    return build_region(node, SPACE, CLASSES, "region")


fractions = st.tuples(st.floats(0, 1), st.floats(0, 1)).filter(lambda p: p[0] < p[1] - 1e-6)
x_intervals = st.tuples(st.floats(0, 10), st.floats(0, 10)).filter(lambda p: p[0] < p[1] - 1e-6)
# arcs of non-zero width: [360, 0] is a point on the circle, as [a, a] is (refused, tested below)
angles = st.tuples(st.floats(0, 360), st.floats(0, 360)).filter(lambda p: 1e-3 < (p[1] - p[0]) % 360 < 360 - 1e-3)


@settings(max_examples=50, deadline=None)
@given(st.sampled_from(["x", "scale", "angle"]), fractions)
def test_band_equals_its_yaml_form(axis, at):
    assert band(SPACE, axis, at) == yaml({"band": {"axis": axis, "at": list(at)}})


@settings(max_examples=50, deadline=None)
@given(x_intervals, angles)
def test_box_equals_its_yaml_form(xi, ai):
    py = box(SPACE, x=xi, angle=ai)
    assert py == yaml({"x": list(xi), "angle": list(ai)})
    # the keyword and mapping forms agree, and a wrapping angle interval is one set
    assert py == box(SPACE, {"x": xi}, angle=[ai])


@pytest.mark.parametrize("arc", [(360.0, 0.0), (90.0, 90.0)])
def test_a_zero_width_arc_is_refused_by_both_forms(arc):
    with pytest.raises(ValueError, match="zero width"):
        box(SPACE, angle=arc)
    with pytest.raises((ValueError, SpecError), match="zero width"):
        yaml({"angle": list(arc)})


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 4), st.integers(1, 4), st.sampled_from(["all", "checkerboard", "checkerboard_odd", "list"]),
       st.data())
def test_cells_equal_their_yaml_form(nx, na, pick, data):
    if pick == "list":
        pick = data.draw(st.lists(st.tuples(st.integers(0, nx - 1), st.integers(0, na - 1)), min_size=1, max_size=5))
        pick = [list(c) for c in pick]
    grid = {"x": nx, "angle": na}
    assert cells(SPACE, grid, pick) == yaml({"cells": {"grid": grid, "pick": pick}})


@settings(max_examples=40, deadline=None)
@given(x_intervals, x_intervals, st.booleans())
def test_by_class_equals_its_yaml_form(ia, ib, rest):
    node = {"a": {"x": list(ia)}, "b": {"x": list(ib)}}
    parts = {"a": box(SPACE, x=ia), "b": box(SPACE, x=ib)}
    if rest:
        node["*"] = {"band": {"axis": "scale", "at": [0, 0.5]}}
        parts["*"] = band(SPACE, "scale", (0, 0.5))
    py = by_class(SPACE, CLASSES, parts)
    assert py == yaml({"by_class": node})
    # by hand: the union over classes of (part & that class)
    want = (box(SPACE, x=ia) & of_classes(SPACE, CLASSES, "a")) | (box(SPACE, x=ib) & of_classes(SPACE, CLASSES, "b"))
    if rest:
        want = want | (band(SPACE, "scale", (0, 0.5)) & of_classes(SPACE, CLASSES, "c"))
    assert py == want


@settings(max_examples=60, deadline=None)
@given(x_intervals, x_intervals, st.floats(0.05, 9.95))
def test_equality_is_set_equality(i1, i2, cut):
    a = box(SPACE, x=[i1, i2])
    lo, hi = min(i1[0], i2[0]), max(i1[1], i2[1])
    # the same set cut differently: split every box at `cut`
    parts = (a & box(SPACE, x=(0, cut))) | (a & box(SPACE, x=(cut, 10)))
    assert parts == a and hash(parts) == hash(a)
    assert (a | a) == a and (a - a) == Region.empty(SPACE)
    # union / difference algebra (sets): (A - B) | (A & B) == A
    b = box(SPACE, x=(cut, 10))
    assert (a - b) | (a & b) == a
    if hi - lo > 1e-3:
        bigger = box(SPACE, x=(lo, min(hi + 0.5, 10))) if hi < 9.5 else box(SPACE, x=(max(lo - 0.5, 0), hi))
        assume(bigger.mass() > box(SPACE, x=(lo, hi)).mass() + 1e-9)
        assert bigger != box(SPACE, x=(lo, hi))


def test_regions_of_different_spaces_differ_and_other_types_are_not_equal():
    other = Space([Axis("x", 0, 10, unit="px")])
    assert box(other, x=(0, 5)) != box(SPACE, x=(0, 5))
    assert box(SPACE, x=(0, 5)) != "box"


def test_reprs_show_how_a_region_was_made():
    r = band(SPACE, "x", (0, 0.3)) | cells(SPACE, {"angle": 4}, "checkerboard")
    text = repr(r)
    assert text.startswith("Region(band('x', at=(0, 0.3)) | cells({'angle': 4}, pick='checkerboard');")
    assert len(text) < 300
    big = by_class(SPACE, CLASSES, {c: box(SPACE, x=(0, 1 + i), angle=(330, 30)) for i, c in enumerate(CLASSES)})
    assert len(repr(big)) < 300
    assert "x=(0, 5)" in repr(yaml({"x": [0, 5]}))  # a spec's region shows the same builders


@pytest.mark.parametrize("call, words", [
    (lambda: band(SPACE, "y", (0, 1)), "unknown axis 'y'"),
    (lambda: band(SPACE, "x", (0.5, 0.2)), "at must be"),
    (lambda: cells(SPACE, {"x": 0}), "positive integer"),
    (lambda: cells(SPACE, {"x": 2}, [[3]]), "not an index"),
    (lambda: of_classes(SPACE, CLASSES, "zebra"), "unknown class 'zebra'"),
    (lambda: box(SPACE, x=(5, 2)), "empty"),
])
def test_bad_arguments_say_what_is_wrong(call, words):
    with pytest.raises(ValueError, match=words):
        call()


def test_yaml_errors_keep_their_key_path():
    with pytest.raises(SpecError, match=r"^region\.band\.at: at must be"):
        yaml({"band": {"axis": "x", "at": [0.5, 0.2]}})
    with pytest.raises(SpecError, match=r"^region\.cells\.pick\.1: cell \[7, 0\] is not an index"):
        yaml({"cells": {"grid": {"x": 2, "angle": 2}, "pick": [[0, 0], [7, 0]]}})
    with pytest.raises(SpecError, match=r"^region\.x\.1: interval \[5, 2\] is empty"):
        yaml({"x": [[0, 1], [5, 2]]})


def test_contains_agrees_with_the_builders_meaning():
    r = box(SPACE, angle=(330, 30))  # wraps through 0
    pts = {"x": np.full(4, 5.0), "scale": np.ones(4), "angle": np.array([340.0, 10.0, 90.0, 329.0]), CLASS: np.zeros(4)}
    assert r.contains(pts).tolist() == [True, True, False, False]
