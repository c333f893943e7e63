"""Score's reference and ranges, at the library level: wrapping circular values (property
tests), same-class distances against brute force, circular tables and plots inside their axis
range, the caution when the training split is the reference, and plots that leave the
caller's matplotlib state alone."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.distance import cdist

from augsplit import score as S
from augsplit.score import plots
from augsplit.score.distance import DISTANCE_AXES, reference_distance
from augsplit.score.tables import value_table

finite = st.floats(-1e6, 1e6, allow_nan=False)


@settings(max_examples=300, deadline=None)
@given(v=finite, lo=st.floats(-720, 720, allow_nan=False), period=st.sampled_from([360.0, 180.0, 1.0]))
def test_wrap_lands_in_the_range_by_whole_periods(v, lo, period):
    # definition of a circular coordinate (from memory): v and v + k * period are one point
    w = float(S.wrap(v, lo, period))
    assert lo <= w < lo + period
    k = (v - w) / period
    assert abs(k - round(k)) < 1e-6 * max(1.0, abs(k))
    assert float(S.wrap(w, lo, period)) == pytest.approx(w, abs=1e-9)  # idempotent


@settings(max_examples=200, deadline=None)
@given(v=finite, k=st.integers(-50, 50))
def test_wrap_ignores_whole_turns(v, k):
    # the same angle a whole number of turns later wraps to the same value (from memory)
    a, b = float(S.wrap(v)), float(S.wrap(v + 360.0 * k))
    assert min(abs(a - b), 360.0 - abs(a - b)) < 1e-6


def test_wrap_of_a_value_just_below_lo_stays_below_the_top():
    # np.mod(-1e-20, 360) is 360.0 in floating point; the top of the range is excluded
    assert 0.0 <= float(S.wrap(-1e-20)) < 360.0


def _manifest(rng, n=240, angle_lo=0.0):
    cls = np.arange(n) % 3
    split = np.where(np.arange(n) < n * 2 // 3, "train", "test")
    # each class trained at its own x; tested at another class's x (a per-class protocol)
    x = np.where(split == "train", 10.0 + 30.0 * cls, 10.0 + 30.0 * ((cls + 1) % 3)) + rng.uniform(-3, 3, n)
    return pd.DataFrame({"image_id": [f"i{i}" for i in range(n)], "split": split, "class_index": cls,
                         "class_name": [f"c{c}" for c in cls], "cx_px": x, "cy_px": rng.uniform(0, 5, n),
                         "angle": angle_lo + np.mod(rng.uniform(-40, 40, n), 360.0)})


def test_same_class_distance_equals_brute_force():
    rng = np.random.default_rng(5)
    m = _manifest(rng)
    ax = next(a for a in DISTANCE_AXES if a.name == "position_px")
    train, test = m[m["split"] == "train"], m[m["split"] == "test"]
    got = reference_distance(train, test, ax, same_class=True)
    # brute force with scipy cdist, class by class
    for c in range(3):
        q = test["class_index"].to_numpy() == c
        tr = train.loc[train["class_index"] == c, ["cx_px", "cy_px"]].to_numpy()
        assert np.allclose(got[q], cdist(test.loc[q, ["cx_px", "cy_px"]].to_numpy(), tr).min(1))
    anyc = reference_distance(train, test, ax, same_class=False)
    assert np.allclose(anyc, cdist(test[["cx_px", "cy_px"]].to_numpy(), train[["cx_px", "cy_px"]].to_numpy()).min(1))
    assert (got >= anyc - 1e-12).all() and got.min() > 20 > anyc.max()


def test_a_class_without_training_images_has_no_same_class_distance():
    rng = np.random.default_rng(6)
    m = _manifest(rng)
    train = m[(m["split"] == "train") & (m["class_index"] != 2)]
    test = m[m["split"] == "test"]
    got = reference_distance(train, test, DISTANCE_AXES[0], same_class=True)
    assert np.isnan(got[test["class_index"].to_numpy() == 2]).all()
    assert np.isfinite(got[test["class_index"].to_numpy() != 2]).all()


def _score(m, **kw):
    preds = pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]})
    preds.attrs["where"] = "preds.csv"
    return S.score(m, preds, "train", **kw)


def test_score_says_which_reference_and_cautions_on_the_training_split():
    rng = np.random.default_rng(7)
    m = _manifest(rng)
    same, anyc = _score(m, same_class=True), _score(m, same_class=False)
    assert same.distance_reference == "same class" and anyc.distance_reference == "any class"
    assert same.to_json()["distance_reference"] == "same class"
    d_same = same.distance[same.distance["axis"] == "position_px"]
    d_any = anyc.distance[anyc.distance["axis"] == "position_px"]
    assert d_same["held_out_along"].all() and not d_any["held_out_along"].any()
    assert any(n.startswith("caution") for n in same.notes)
    assert "same class" in S.format_table(same)
    # with an i.i.d. reference named, no caution
    m2 = m.copy()
    m2.loc[m2.index[:20], "split"] = "iid"
    assert not any(n.startswith("caution") for n in _score(m2, reference_split="iid").notes)


def test_the_manifest_can_say_the_protocol_is_per_class():
    m = _manifest(np.random.default_rng(8))
    m.attrs.update(per_class=True, per_class_reason="a test says so")
    r = _score(m)
    assert r.distance_reference == "same class" and any("a test says so" in n for n in r.notes)


@pytest.mark.parametrize("lo", [0.0, -180.0])
def test_circular_value_tables_stay_in_the_axis_range(lo):
    """Angles spread over the seam of the range ([lo - 40, lo + 40] on the circle) read back
    inside [lo, lo + 360), bins and training intervals alike (an interval may wrap: a > b)."""
    m = _manifest(np.random.default_rng(9), angle_lo=lo)
    m["correct"] = True
    t, ranges = value_table(m, m, "train", 16, 0.95, {"angle": lo})
    a = t[t["axis"] == "angle"]
    assert len(a)
    for col in ("lo", "hi", "centre"):
        assert a[col].between(lo, lo + 360, inclusive="left").all(), a[col].describe()
    ivals = ranges["angle"]["intervals"]
    assert ivals and all(lo <= x < lo + 360 for iv in ivals for x in iv)
    assert any(x > y for x, y in ivals)  # the training arc crosses the seam, so it wraps


def test_plots_keep_circular_values_in_range_and_leave_pyplot_alone():
    import matplotlib
    import matplotlib.pyplot as plt

    m = _manifest(np.random.default_rng(10))
    r = _score(m)
    before, figs = matplotlib.get_backend(), plt.get_fignums()
    fig = plots.plot_values([("m", r)])
    assert type(fig).__name__ == "Figure" and plt.get_fignums() == figs
    for ax in fig.axes:
        if ax.get_xlabel().startswith("angle"):
            xs = np.concatenate([ln.get_xdata() for ln in ax.get_lines() if len(ln.get_xdata())])
            assert len(xs) and (xs >= 0).all() and (xs < 360).all()
            lo, hi = ax.get_xlim()
            assert lo >= 0 and hi <= 360
    S.render_html([("m", r)])
    assert matplotlib.get_backend() == before and plt.get_fignums() == figs


def test_render_html_does_not_switch_the_backend():
    """The caller's backend survives a report (a notebook keeps its inline plots)."""
    import matplotlib

    m = _manifest(np.random.default_rng(11))
    r = _score(m)
    before = matplotlib.get_backend()
    matplotlib.use("svg")
    try:
        S.render_html([("m", r)])
        assert matplotlib.get_backend() == "svg"
    finally:
        matplotlib.use(before)


def test_the_plan_decides_whether_the_protocol_is_per_class():
    """A per-class guarantee, or regions that put classes in different places, make the
    protocol per class; the small per-class shrinking keep_inside makes does not."""
    from pathlib import Path
    from types import SimpleNamespace

    import yaml

    from augsplit.build import open_mapping
    from augsplit.score.inputs import per_class_protocol

    configs = Path(__file__).resolve().parent.parent / "configs"

    def protocol(d):
        built = open_mapping(d)
        return per_class_protocol(SimpleNamespace(plan=built.plan, spec=built.spec))

    pc = yaml.safe_load((configs / "per_class_placement.yaml").read_text())
    assert "per class" in protocol(pc)
    pc["guarantees"] = []
    assert "each class from its own region" in protocol(pc)
    assert protocol(yaml.safe_load((configs / "scale_extrapolation.yaml").read_text())) is None
    assert protocol(yaml.safe_load((configs / "translation_no_overlap.yaml").read_text())) is None
