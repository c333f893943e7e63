"""The planner never says "disjoint" about a spec where a shared pixel exists, and when it
refuses it (nearly always) shows two placements that share one.

For random specs we rasterise the real footprints (the renderer's own) of many sampled train
and test placements, plus placements pushed to the edges of their boxes (boundary positions,
largest scales, end angles) and the closest-point placements, and assert that no test
footprint shares a pixel with the union of train footprints whenever the planner proved the
footprint guarantee (by the disc bound or by rasterised envelopes). When it refuses, the
witness it reports is re-rendered here and must share a pixel, with each placement inside
its split's region (checked from the reported parameters, not the planner's own helper).
Reference for the shared-pixel check: brute-force boolean mask intersection (numpy).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from augsplit.build import open_mapping
from augsplit.errors import AugsplitError
from augsplit.plan.draw import draw
from augsplit.plan.envelope import region_items
from augsplit.plan.guarantees import footprint_gaps, tightest
from augsplit.plan.witness import find_witness
from augsplit.render import RenderParams, footprint

W = H = 64


@st.composite
def footprint_specs(draw_):
    cells = draw_(st.sampled_from([2, 3, 4]))
    cell_px = draw_(st.sampled_from([2, 3, 4, 5]))
    lo = draw_(st.floats(0.6, 1.3))
    hi = lo * draw_(st.floats(1.0, 1.8))
    axes = {"scale": {"range": [round(lo, 3), round(hi, 3) + 0.001]}}
    full_turn = draw_(st.booleans())
    axes["angle"] = {"range": [0, 360]} if full_turn else {"range": [-draw_(st.integers(0, 60)), draw_(st.integers(1, 60))]}
    if draw_(st.booleans()):
        axes["mirror"] = {"levels": [0, 1]}
    layout = draw_(st.sampled_from(["x", "y", "polar"]))
    if layout in ("x", "y"):
        axes["x"] = {"range": [0, W]}
        axes["y"] = {"range": [0, H]}
        a = draw_(st.integers(4, 36))
        b = draw_(st.integers(a, min(a + 40, 60)))
        train = {layout: [0, a]}
        test = {layout: [b, 64]}
        if draw_(st.booleans()):  # a second box: the region is a union
            other = "y" if layout == "x" else "x"
            test = {"any_of": [test, {layout: [b, 64], other: [0, 20]}]}
    else:
        r0 = draw_(st.integers(6, 20))
        axes["eccentricity"] = {"range": [r0, r0 + draw_(st.integers(1, 12))]}
        axes["polar_angle"] = {"range": [0, 360]}
        t1 = draw_(st.integers(20, 160))
        t2 = draw_(st.integers(t1 + 1, 300))
        train = {"polar_angle": [0, t1]}
        test = {"polar_angle": [t2, 340]}
    spec = {
        "seed": draw_(st.integers(0, 10_000)),
        "canvas": {"width": W, "height": H, "mode": "gray"},
        "objects": {"kind": "polyomino", "cells": cells, "cell_px": cell_px},
        "axes": axes,
        "splits": {"train": {"region": train, "per_class": 40}, "test": {"region": test, "per_class": 20}},
        "guarantees": [{"disjoint": "footprint", "between": ["train", "test"], "per_class": draw_(st.booleans())}],
    }
    return spec


def _coverage(built, split, per_class: bool):
    cols = draw(built.plan, split, np.arange(split.total))
    cover = {}
    for i in range(split.total):
        c = int(cols["class_index"][i]) if per_class else -1
        p = RenderParams(cols["cx_px"][i], cols["cy_px"][i], cols["scale"][i], cols["angle"][i], bool(cols["mirror"][i]))
        fp = footprint(built.source.sprite(int(cols["class_index"][i]), int(cols["instance"][i])), p, (H, W))
        m = cover.setdefault(c, np.zeros((H, W), bool))
        x0, y0, x1, y1 = fp.bbox
        m[y0:y1, x0:x1] |= fp.mask
    return cover


def _shared(a, b) -> int:
    ax0, ay0, ax1, ay1 = a.bbox
    bx0, by0, bx1, by1 = b.bbox
    ma = np.zeros((H, W), bool)
    mb = np.zeros((H, W), bool)
    ma[ay0:ay1, ax0:ax1] = a.mask
    mb[by0:by1, bx0:bx1] = b.mask
    return int(np.count_nonzero(ma & mb))


def _edge_coverage(built, split, per_class: bool, rng, n: int = 60):
    """Footprints of placements at the edges of each box: anchors on the boundary of the
    position set, largest (or any) scale, end (or any) angle -- where envelopes meet."""
    plan = built.plan
    sprites = {c: [built.source.sprite(c, i) for i in plan.instance_ids(split, c)] for c in range(len(plan.classes))}
    cover = {}
    for it in region_items(plan.space, plan.canvas, split.region, sprites):
        m = cover.setdefault(it.cls if per_class else -1, np.zeros((H, W), bool))
        for _ in range(n):
            u, side = rng.random(2), rng.integers(4)
            u[side // 2] = side % 2  # a point on one edge of the (rect or polar) box
            if it.position.kind == "rect":
                x0, x1, y0, y1 = it.position.bounds
                cx, cy = x0 + u[0] * (x1 - x0), y0 + u[1] * (y1 - y0)
            else:
                r0, r1, p0, p1 = it.position.bounds
                r, a = r0 + u[0] * (r1 - r0), np.radians(p0 + u[1] * (p1 - p0))
                cx, cy = W / 2 + r * np.cos(a), H / 2 - r * np.sin(a)
            sa, sb = it.pose.scales[rng.integers(len(it.pose.scales))]
            a0, a1 = it.pose.angles[rng.integers(len(it.pose.angles))]
            s = sb if rng.random() < 0.7 else sa + rng.random() * (sb - sa)
            ang = (a0, a1)[rng.integers(2)] if rng.random() < 0.6 else a0 + rng.random() * (a1 - a0)
            mirror = it.pose.mirrors[rng.integers(len(it.pose.mirrors))]
            fp = footprint(it.sprites[rng.integers(len(it.sprites))], RenderParams(cx, cy, s, ang, mirror), (H, W))
            x0_, y0_, x1_, y1_ = fp.bbox
            m[y0_:y1_, x0_:x1_] |= fp.mask
    return cover


def _in_split(plan, split, placement: dict) -> bool:
    """Whether a reported placement is one the split can draw: its parameters, recovered
    from canvas px, lie in the split's region (axes that do not move pixels: any value)."""
    space = plan.space
    cls = plan.classes.index(placement["class"])
    if placement["instance"] not in plan.instance_ids(split, cls):
        return False
    x, y = placement["cx_px"], placement["cy_px"]
    values = {"class": float(cls)}
    if "eccentricity" in space:
        values["eccentricity"] = float(np.hypot(x - W / 2, y - H / 2))
        values["polar_angle"] = float(np.degrees(np.arctan2(-(y - H / 2), x - W / 2)) % 360.0)
    else:
        values["x"], values["y"] = x, y
    values.update(scale=placement["scale"], angle=placement["angle"], mirror=float(placement["mirror"]))
    pts = {n: values.get(n, np.nan) for n in space.names}
    region = split.region.restrict("class", cls - 0.5, cls + 0.5)
    t = space.to_t(pts)
    return bool(region.contains_t(t)[0])


def _check_witness(built, per_class: bool, witness: dict) -> None:
    plan = built.plan
    a, b = witness["a"], witness["b"]
    sa = built.source.sprite(plan.classes.index(a["class"]), a["instance"])
    sb = built.source.sprite(plan.classes.index(b["class"]), b["instance"])
    fa = footprint(sa, RenderParams(a["cx_px"], a["cy_px"], a["scale"], a["angle"], a["mirror"]), (H, W))
    fb = footprint(sb, RenderParams(b["cx_px"], b["cy_px"], b["scale"], b["angle"], b["mirror"]), (H, W))
    assert _shared(fa, fb) > 0, "the witness's footprints share no pixel"
    assert _in_split(plan, plan.split("train"), a) and _in_split(plan, plan.split("test"), b), \
        "a witness placement lies outside its split's region"
    if per_class:
        assert a["class"] == b["class"]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(footprint_specs())
def test_proved_means_no_shared_pixel_and_refused_means_a_witness(spec):
    try:
        built = open_mapping(spec, strict=False)
    except AugsplitError:  # a spec refused as bad input (an empty region, ...) is not this test's subject
        assume(False)
    plan = built.plan
    (v,) = plan.verdicts
    per_class = spec["guarantees"][0]["per_class"]
    train, test = plan.split("train"), plan.split("test")
    if v.status == "proved":
        cov_train = _coverage(built, train, per_class)
        cov_test = _coverage(built, test, per_class)
        rng = np.random.default_rng(spec["seed"])
        edge_train = _edge_coverage(built, train, per_class, rng)
        edge_test = _edge_coverage(built, test, per_class, rng)
        for c in set(cov_test) | set(edge_test):
            m_test = cov_test.get(c, np.zeros((H, W), bool)) | edge_test.get(c, np.zeros((H, W), bool))
            m_train = cov_train.get(c, np.zeros((H, W), bool)) | edge_train.get(c, np.zeros((H, W), bool))
            assert not np.any(m_test & m_train), "shared pixel under a proved guarantee"
        # adversarial placements: closest points, objects facing each other, largest scale
        radii = plan.radii
        gaps = footprint_gaps(plan.space, plan.canvas, train.region, test.region, radii, radii, per_class)
        t = tightest(gaps)
        sprites_a = [built.source.sprite(t.class_a, 0)]
        sprites_b = [built.source.sprite(t.class_b, 0)]
        fp = lambda s, cx, cy, sc, a, m, hw: footprint(s, RenderParams(cx, cy, sc, a, m), hw)  # noqa: E731
        assert find_witness(plan.space, plan.canvas, train.region, test.region, t, sprites_a, sprites_b, fp) is None
        if v.numbers.get("stage") == "envelope":
            assert "by rasterised envelopes" in v.message and v.numbers["slack_px"] <= 0
    else:
        assert v.status == "refused"
        witness = v.numbers.get("witness")
        if witness:
            assert v.numbers["status"] == "overlap"
            _check_witness(built, per_class, witness)
        else:
            # rare (see the rate test): the envelopes share pixels no search could settle
            assert v.numbers["status"] == "unproven" and "cannot be proved" in v.message
            assert v.numbers["envelope"]["undecided"] > 0


def test_refusals_carry_a_verified_witness_at_least_99_percent_of_the_time():
    # The same random specs as above, a fixed sample (derandomised). Measured on 2400 specs
    # of this distribution: before the envelope stage 176 of 1807 refusals (9.7%) had no witness;
    # with it none. Here: at most 1% of refusals may stay "unproven".
    outcomes = []

    @settings(max_examples=150, deadline=None, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
    @given(footprint_specs())
    def collect(spec):
        try:
            built = open_mapping(spec, strict=False)
        except AugsplitError:
            return
        (v,) = built.plan.verdicts
        if v.status == "refused":
            w = v.numbers.get("witness")
            if w:
                _check_witness(built, spec["guarantees"][0]["per_class"], w)
            outcomes.append(bool(w))

    collect()
    assert len(outcomes) >= 60
    assert outcomes.count(False) <= 0.01 * len(outcomes), f"{outcomes.count(False)} of {len(outcomes)} refusals lack a witness"


@pytest.mark.parametrize("layout", ["x", "polar"])
def test_safe_only_because_rotation_is_restricted_is_now_proved(layout):
    # A domino (8 x 4 px) that may only turn 10 degrees stays flat: across a horizontal gap
    # of about 7 px it never reaches the other split (it rises about 2.7 px from its anchor),
    # but the rotation-invariant disc bound needs 9.7 px and refuses. The envelopes prove it.
    axes = {"angle": {"range": [-10, 10]}, "scale": {"range": [1.0, 1.001]}}
    if layout == "x":
        axes |= {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}}
        train, test = {"y": [0, 24]}, {"y": [31, 64]}
    else:  # polar sectors above and below the canvas centre, 2 x 4 sin 60 = 6.9 px apart
        axes |= {"eccentricity": {"range": [4, 24]}, "polar_angle": {"range": [0, 360]}}
        train, test = {"polar_angle": [60, 120]}, {"polar_angle": [240, 300]}
    spec = {"seed": 5, "canvas": {"width": W, "height": H, "mode": "gray"},
            "objects": {"kind": "polyomino", "cells": 2, "cell_px": 4}, "axes": axes,
            "splits": {"train": {"region": train, "per_class": 40}, "test": {"region": test, "per_class": 40}},
            "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}]}
    built = open_mapping(spec, strict=False)
    (v,) = built.plan.verdicts
    assert v.status == "proved" and v.numbers["slack_px"] < 0 and "by rasterised envelopes" in v.message
    plan = built.plan
    rng = np.random.default_rng(0)
    a = _coverage(built, plan.split("train"), False)[-1] | _edge_coverage(built, plan.split("train"), False, rng, 200)[-1]
    b = _coverage(built, plan.split("test"), False)[-1] | _edge_coverage(built, plan.split("test"), False, rng, 200)[-1]
    assert a.any() and b.any() and not np.any(a & b)
    # turning freely, the same domino does reach across, and the refusal shows where
    spec["axes"]["angle"] = {"range": [0, 360]}
    (v2,) = open_mapping(spec, strict=False).plan.verdicts
    assert v2.status == "refused" and v2.numbers["witness"]


def test_witness_uses_the_instances_each_split_may_draw():
    # glyphs in four fonts, two held out: train draws seen instances, test unseen ones
    spec = {"seed": 1, "canvas": {"width": W, "height": H},
            "objects": {"kind": "glyphs", "texts": ["A", "T"], "height_px": 10, "unseen_instances": 2},
            "axes": {"x": {"range": [0, 64]}, "angle": {"range": [-20, 20]}},
            "splits": {"train": {"region": {"x": [0, 28]}, "per_class": 2, "instances": "seen"},
                       "test": {"region": {"x": [36, 64]}, "per_class": 2, "instances": "unseen"}},
            "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}]}
    built = open_mapping(spec, strict=False)
    (v,) = built.plan.verdicts
    assert v.status == "refused" and v.numbers["witness"]
    _check_witness(built, False, v.numbers["witness"])


def test_demo_far_lane_has_no_shared_pixel_with_training():
    # the built-in demo: every generated far-lane footprint avoids every training footprint
    from augsplit.build import open_spec
    from augsplit.spec import builtin_spec_path

    built = open_spec(builtin_spec_path("demo"))
    plan = built.plan
    cov_train = _coverage(built, plan.split("train"), False)[-1]
    cov_test = _coverage(built, plan.split("test_far_lane"), False)[-1]
    assert cov_train.any() and cov_test.any()
    assert not np.any(cov_train & cov_test)


def test_refusal_reports_gap_need_and_class():
    spec = {
        "seed": 3, "canvas": {"width": 64, "height": 64},
        "objects": {"kind": "polyomino", "cells": 4, "cell_px": 4},
        "axes": {"x": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
        "splits": {"train": {"region": {"x": [0, 30]}, "per_class": 2}, "test": {"region": {"x": [34, 64]}, "per_class": 2}},
        "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}],
    }
    from augsplit.errors import GuaranteeError

    with pytest.raises(GuaranteeError) as e:
        open_mapping(spec)
    msg = str(e.value)
    assert "position gap 4.00 px" in msg and "px needed" in msg and "class P4-" in msg and "share" in msg


def test_auto_guard_shrinks_test_region_until_proved():
    spec = {
        "seed": 3, "canvas": {"width": 64, "height": 64},
        "objects": {"kind": "polyomino", "cells": 4, "cell_px": 4},
        "axes": {"x": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
        "splits": {"train": {"region": {"x": [0, 30]}, "per_class": 5}, "test": {"region": {"x": [34, 64]}, "per_class": 5}},
        "guarantees": [{"disjoint": "footprint", "between": ["train", "test"], "auto_guard": True}],
    }
    built = open_mapping(spec)
    (v,) = built.plan.verdicts
    assert v.status == "guarded" and 0 < v.numbers["removed_fraction"] < 1
    test = built.plan.split("test")
    lo, hi = test.region.axis_extent("x")
    # the band is the narrowest on the auto_guard grid that the proof accepts: no wider than
    # the disc bound's need, and one grid step less is not proved
    from augsplit.plan.guard import GUARD_STEP_PX

    assert lo == pytest.approx(30 + v.numbers["guard_px"]) and v.numbers["guard_px"] <= v.numbers["need_px"] + GUARD_STEP_PX
    narrower = dict(spec, guarantees=[{"disjoint": "footprint", "between": ["train", "test"]}])
    narrower["splits"] = dict(spec["splits"], test={"region": {"x": [lo - GUARD_STEP_PX, 64]}, "per_class": 5})
    assert not open_mapping(narrower, strict=False).plan.verdicts[0].ok
    cov_train = _coverage(built, built.plan.split("train"), False)[-1]
    cov_test = _coverage(built, test, False)[-1]
    assert not np.any(cov_train & cov_test)
