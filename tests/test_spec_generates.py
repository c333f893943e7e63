"""What `plan` accepts, `generate` makes: for random specs (small canvases, random axes,
regions, object kinds, backgrounds and distractors, with edge values among them), every spec
the planner accepts renders one image per split without an error.

Measured on main: seed 10^21, `distractors.count: [5, 2]` and `levels: [.nan, 1.0]` planned
fine, then generate failed with a traceback after spec.json was written.
"""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from augsplit.build import open_mapping
from augsplit.errors import SourceError, SpecError
from augsplit.generate import Options, generate

EDGE_FLOATS = st.sampled_from([math.nan, math.inf, -math.inf])


RARELY = st.integers(0, 9).map(lambda k: k == 4)  # about one time in ten (hypothesis favours 0 and 9)


def _interval(lo: float, hi: float):
    """[a, b] inside [lo, hi]; rarely reversed or degenerate (the planner must refuse those)."""
    return st.builds(lambda a, b, flip: [max(a, b), min(a, b)] if flip else [min(a, b), max(a, b)],
                     st.floats(lo, hi), st.floats(lo, hi), RARELY)


def _axis(name: str, w: int, h: int):
    if name in ("x", "y"):
        ext = w if name == "x" else h
        return st.one_of(st.builds(lambda r: {"range": r}, _interval(0, ext)),
                         st.just({"unit": "frac", "range": [0.1, 0.9]}), st.just({}),
                         st.builds(lambda r: {"unit": "deg", "range": r}, _interval(-3, 3)))
    if name == "eccentricity":
        return st.one_of(st.just({}), st.builds(lambda r: {"range": r}, _interval(0, 30)),
                         st.builds(lambda r: {"unit": "deg", "range": r}, _interval(0, 3)))
    if name == "polar_angle":
        return st.one_of(st.just({}), st.builds(lambda r: {"range": r}, _interval(0, 360)))
    if name == "scale":
        return st.one_of(st.builds(lambda r, big: {"range": [r[0], r[1] * 2500] if big else r},
                                   _interval(0.05, 4), RARELY),
                         st.just({"range": [0.5, 2.0], "dist": "log"}),
                         st.builds(lambda v, bad, e: {"levels": v + [e] if bad else v},
                                   st.lists(st.floats(0.5, 2), min_size=1, max_size=3), RARELY, EDGE_FLOATS))
    if name in ("angle", "hue"):
        return st.one_of(st.just({"range": [0, 360]}), st.builds(lambda r: {"range": r}, _interval(0, 360)))
    if name in ("saturation", "brightness"):
        return st.builds(lambda r: {"range": r}, _interval(0, 2))
    return st.one_of(st.just({"levels": [0, 1]}), st.just({"levels": [1]}), st.just({}))  # mirror


OBJECTS = st.one_of(
    st.builds(lambda n, px, gap: {"kind": "polyomino", "cells": n, "cell_px": px, "gap_px": gap},
              st.integers(1, 4), st.integers(1, 4), st.integers(0, 2)),
    st.builds(lambda t, hpx: {"kind": "glyphs", "texts": t, "height_px": hpx, "thickness": 1},
              st.lists(st.sampled_from(["A", "T", "?", "/", "ab"]), min_size=1, max_size=3, unique=True),
              st.integers(6, 12)),
)

BACKGROUNDS = st.one_of(
    st.builds(lambda v: {"kind": "solid", "value": v}, st.floats(0, 1)),
    st.builds(lambda lo, hi: {"kind": "uniform_noise", "lo": lo, "hi": hi}, st.floats(0, 1), st.floats(0, 1)),
    st.builds(lambda m, sd: {"kind": "gaussian_noise", "mean": m, "sd": sd}, st.floats(0, 1), st.floats(0, 0.5)),
    st.builds(lambda m, c, e, pc: {"kind": "pink_noise", "mean": m, "contrast": c, "exponent": e, "per_channel": pc},
              st.floats(0, 1), st.floats(0, 1), st.floats(0, 5), st.booleans()),
)


@st.composite
def specs(draw):
    w, h = draw(st.integers(16, 48)), draw(st.integers(16, 48))
    position = draw(st.sampled_from([["x", "y"], ["eccentricity", "polar_angle"], ["eccentricity"], []]))
    names = position[:draw(st.integers(0, len(position)))] + draw(st.lists(
        st.sampled_from(["scale", "angle", "hue", "saturation", "brightness", "mirror"]), max_size=3, unique=True))
    axes = {n: draw(_axis(n, w, h)) for n in names}
    split_names = draw(st.lists(st.sampled_from(["train", "test", "test_far", "val.1", "x-2"]), min_size=1,
                                max_size=3, unique=True))
    splits = {}
    for s in split_names:
        region = {}
        if names and draw(st.booleans()):
            region = {"band": {"axis": draw(st.sampled_from(names)), "at": sorted(draw(st.lists(
                st.floats(0, 1), min_size=2, max_size=2)))}}
        splits[s] = {"region": region, "count": 1}
    d = {
        # rarely beyond int64 (the manifest's seed column) or a distractor count [max, min]
        "seed": draw(st.integers(2**63, 10**21) if draw(RARELY) else st.integers(0, 2**63 - 1)),
        "canvas": {"width": w, "height": h, "mode": draw(st.sampled_from(["gray", "rgb"]))},
        **({"viewing": {"distance_cm": 57, "px_per_cm": draw(st.floats(1, 10))}} if draw(st.booleans()) else {}),
        "objects": draw(OBJECTS),
        "background": draw(BACKGROUNDS),
        "axes": axes,
        "render": {"keep_inside": draw(st.booleans()),
                   "distractors": {"count": sorted(draw(st.lists(st.integers(0, 3), min_size=2, max_size=2)),
                                                   reverse=draw(RARELY)),
                                   "attempts": draw(st.integers(1, 60))}},
        "splits": splits,
    }
    return d


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(spec=specs())
def test_every_spec_plan_accepts_generates(spec):
    try:
        built = open_mapping(spec)
    except (SpecError, SourceError) as err:
        event(f"refused: {err.where.split('.')[0] if err.where else 'spec'}")
        return  # refused at read time, in one line: that is the other half of the promise
    event("accepted")
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "ds"
        summary = generate(None, out, Options(progress=False), built=built)
        assert summary["images"] == len(spec["splits"])
        assert {k: v["images"] for k, v in summary["splits"].items()} == {k: 1 for k in spec["splits"]}
