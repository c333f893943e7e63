"""Axes: intervals in axis units -> t-intervals, t <-> value round trips, refusals."""

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from augsplit.space import CIRCULAR, LEVELS, LINEAR, LOG, Axis, Space

ANGLE = Axis("angle", 0.0, 360.0, CIRCULAR, "deg")
X = Axis("x", -6.0, 6.0, LINEAR, "deg")
SCALE = Axis("scale", 0.5, 4.0, LOG, "x")
# deliberately unsorted, so an interval of values can pick non-adjacent indices
CLASS = Axis("class", 0.0, 11.0, LEVELS, levels=(0.0, 10.0, 1.0, 11.0, 2.0))


def width(pieces):
    return sum(b - a for a, b in pieces)


# ---- circular intervals ---------------------------------------------------------------------
def test_wrap_around_interval_is_two_pieces_of_total_width_60():
    # [330, 30] on a 0..360 circle runs through 0: 330..360 and 0..30 (plain arithmetic on the circle)
    pieces = ANGLE.interval_to_t(330, 30)
    assert sorted(pieces) == [(0.0, 30.0), (330.0, 360.0)]
    assert width(pieces) == pytest.approx(60.0)


def test_wrap_written_with_negative_start_is_the_same_interval():
    assert sorted(ANGLE.interval_to_t(-30, 30)) == sorted(ANGLE.interval_to_t(330, 30))


def test_interval_ending_on_the_seam_is_one_piece():
    # regression: [300, 360] used to come back with a zero-width second piece (0, 0)
    assert ANGLE.interval_to_t(300, 360) == [(300.0, 360.0)]
    assert ANGLE.interval_to_t(360, 30) == [(0.0, 30.0)]


@pytest.mark.parametrize("a, b", [(0, 360), (10, 370), (-90, 400), (152.05, 512.05), (152.3, 512.3)])
def test_a_full_turn_or_more_is_the_whole_circle(a, b):
    # includes bounds whose difference rounds to just under 360 in binary floating point
    assert ANGLE.interval_to_t(a, b) == [(0.0, 360.0)]


@pytest.mark.parametrize("a, b", [(370.3, 10.3), (512.05, 152.05), (512.18, 152.18)])
def test_a_start_one_turn_past_the_end_is_zero_width_not_a_full_turn(a, b):
    with pytest.raises(ValueError, match="zero width"):
        ANGLE.interval_to_t(a, b)


@given(st.floats(-720, 720), st.floats(0.5, 359.5))
def test_circular_width_is_the_counter_clockwise_arc(a, w):
    # the arc from a to a + w has length w whatever turn a is on (definition of arc length)
    pieces = ANGLE.interval_to_t(a, a + w)
    assert width(pieces) == pytest.approx(w, abs=1e-9)
    assert len(pieces) in (1, 2)
    assert all(0.0 <= p <= q <= 360.0 for p, q in pieces)


# ---- refusals -------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "axis, a, b, words",
    [
        (X, 5, 2, ["[5, 2]", "empty"]),
        (X, 1, 1, ["[1, 1]", "zero width"]),
        (X, -8, 2, ["[-8, 2]", "outside", "[-6, 6]"]),
        (X, 2, 7, ["outside"]),
        (X, math.nan, 2, ["not finite"]),
        (X, 0, math.inf, ["not finite"]),
        (SCALE, 0.25, 1, ["outside", "[0.5, 4]"]),
        (SCALE, 2, 2, ["zero width"]),
        (ANGLE, 10, 10, ["[10, 10]", "zero width"]),
        (ANGLE, 370, 10, ["zero width"]),
        (CLASS, 3, 9, ["[3, 9]", "none of the levels"]),
        (CLASS, 2, 1, ["empty"]),
    ],
)
def test_bad_intervals_raise_a_readable_value_error(axis, a, b, words):
    with pytest.raises(ValueError) as err:
        axis.interval_to_t(a, b)
    msg = str(err.value)
    assert "\n" not in msg
    for w in words:
        assert w in msg


@pytest.mark.parametrize(
    "kwargs, words",
    [
        (dict(name="s", lo=0.0, hi=2.0, measure=LOG), ["above zero"]),
        (dict(name="s", lo=2.0, hi=2.0), ["lo < hi"]),
        (dict(name="s", lo=0.0, hi=math.inf), ["finite"]),
        (dict(name="s", lo=0.0, hi=1.0, measure="cubic"), ["unknown measure"]),
        (dict(name="m", lo=0.0, hi=1.0, measure=LEVELS), ["levels"]),
        (dict(name="m", lo=0.0, hi=1.0, measure=LEVELS, levels=(0, 1, 1)), ["distinct"]),
    ],
)
def test_impossible_axes_are_refused(kwargs, words):
    with pytest.raises(ValueError) as err:
        Axis(**kwargs)
    for w in words:
        assert w in str(err.value)


# ---- levels ---------------------------------------------------------------------------------
def test_levels_interval_becomes_unit_cells_in_runs_of_indices():
    # values 0..2 are levels at indices 0, 2, 4 -> three separate unit cells
    assert CLASS.interval_to_t(0, 2) == [(-0.5, 0.5), (1.5, 2.5), (3.5, 4.5)]
    # values 10 and 11 sit at indices 1 and 3: two cells, not one
    assert CLASS.interval_to_t(10, 11) == [(0.5, 1.5), (2.5, 3.5)]
    # every level: one run over all five cells, i.e. the whole t-range
    assert CLASS.interval_to_t(0, 11) == [(-0.5, 4.5)]
    assert CLASS.t_range == (-0.5, 4.5)
    sorted_levels = Axis("k", 0, 4, LEVELS, levels=(0, 1, 2, 3, 4))
    assert sorted_levels.interval_to_t(1, 3) == [(0.5, 3.5)]
    assert sorted_levels.interval_to_t(2, 2) == [(1.5, 2.5)]  # one level is a valid interval


def test_level_values_map_to_indices_and_back():
    v = np.array([11.0, 0.0, 2.0, 10.0, 1.0])
    t = CLASS.to_t(v)
    assert t.tolist() == [3.0, 0.0, 4.0, 1.0, 2.0]
    assert np.array_equal(CLASS.from_t(t), v)


def test_off_level_values_are_nan_and_nan_stays_nan():
    t = CLASS.to_t([0.5, 5.0, -1.0, 12.0, math.nan, math.inf])
    assert np.isnan(t).all()
    # regression: from_t(NaN) on a levels axis used to come back as the first level
    assert np.isnan(CLASS.from_t([math.nan])).all()


# ---- round trips ----------------------------------------------------------------------------
@given(st.floats(0.5, 4.0))
def test_log_round_trip(v):
    assert SCALE.from_t(SCALE.to_t(v)) == pytest.approx(v, rel=1e-12)
    assert SCALE.to_t(v) == pytest.approx(math.log(v))  # t = ln v, by definition of the log measure


@given(st.floats(-6.0, 6.0))
def test_linear_round_trip(v):
    assert X.from_t(X.to_t(v)) == v


@given(st.floats(-1e4, 1e4, allow_nan=False))
def test_circular_to_t_wraps_into_range_and_keeps_the_angle(v):
    t = float(ANGLE.to_t(v))
    assert 0.0 <= t < 360.0
    # same direction: cos and sin agree (from the definition of a periodic coordinate)
    assert math.cos(math.radians(t)) == pytest.approx(math.cos(math.radians(v)), abs=1e-9)
    assert math.sin(math.radians(t)) == pytest.approx(math.sin(math.radians(v)), abs=1e-9)
    assert ANGLE.from_t(t) == t


def test_log_axis_non_positive_values_are_nan():
    assert np.isnan(SCALE.to_t([0.0, -1.0, math.nan])).all()


# ---- space ----------------------------------------------------------------------------------
def test_space_round_trip_and_shape_checks():
    sp = Space([X, SCALE, ANGLE, CLASS])
    v = np.array([[1.0, 2.0, 370.0, 10.0], [-6.0, 0.5, -10.0, 2.0]])
    t = sp.to_t(v)
    assert t.shape == (2, 4)
    back = sp.from_t(t)
    assert np.allclose(back, [[1.0, 2.0, 10.0, 10.0], [-6.0, 0.5, 350.0, 2.0]])
    assert np.array_equal(sp.to_t({"x": 1.0, "scale": 2.0, "angle": 370.0, "class": 10.0}), t[:1])
    with pytest.raises(ValueError, match="shape"):
        sp.to_t(np.zeros((3, 3)))  # would silently mix coordinates if reshaped
    with pytest.raises(ValueError, match="shape"):
        sp.from_t(np.zeros(8))
    with pytest.raises(ValueError, match="angle"):
        sp.to_t({"x": 1.0, "scale": 2.0, "class": 10.0})
    with pytest.raises(ValueError, match="duplicate"):
        Space([X, X])


def test_axes_with_list_levels_stay_hashable():
    a = Axis("m", 0, 1, LEVELS, levels=[0, 1])
    assert hash(Space([a])) == hash(Space([Axis("m", 0, 1, LEVELS, levels=(0, 1))]))
