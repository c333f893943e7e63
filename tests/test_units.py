"""Visual angle and position units against the exact formula and the trade's rule of thumb."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from augsplit.units import Canvas, Viewing, deg_per_cm_at


def test_one_cm_at_57_cm_is_about_one_degree():
    # rule of thumb: 1 cm at about 57 cm subtends about 1 degree (common practice, no source)
    assert deg_per_cm_at(57.0) == pytest.approx(1.0, abs=0.01)
    v = Viewing(distance_cm=57.0, px_per_cm=10.0)
    assert v.size_to_deg(10.0) == pytest.approx(1.0, abs=0.01)


def test_exact_formula_not_small_angle():
    # theta = 2 atan(s / 2d), the exact size formula (any optics or psychophysics handbook; from memory)
    v = Viewing(distance_cm=20.0, px_per_cm=1.0)
    s = 30.0
    assert v.size_to_deg(s) == pytest.approx(math.degrees(2 * math.atan(s / 40.0)))
    small = math.degrees(s / 20.0)  # the small-angle approximation differs clearly at this size
    assert abs(v.size_to_deg(s) - small) > 5


@given(st.floats(0.1, 80.0), st.floats(10.0, 200.0), st.floats(5.0, 100.0))
def test_size_and_offset_round_trip(deg, distance, density):
    v = Viewing(distance, density)
    assert v.size_to_deg(v.deg_to_size(deg)) == pytest.approx(deg, rel=1e-9)
    assert v.offset_to_deg(v.deg_to_offset(deg)) == pytest.approx(deg, rel=1e-9)


def test_offset_is_atan_of_distance():
    v = Viewing(57.0, 10.0)
    assert v.offset_to_deg(570.0) == pytest.approx(45.0)


def test_positions_in_each_unit():
    c = Canvas(200, 100, Viewing(57.0, 10.0))
    assert c.to_px("x", "px", 13.0) == 13.0
    assert c.to_px("x", "frac", 0.25) == 50.0
    assert c.to_px("y", "frac", 0.25) == 25.0
    assert c.to_px("x", "deg", 0.0) == 100.0
    assert c.to_px("x", "deg", 45.0) == pytest.approx(100.0 + 570.0)
    for unit in ("px", "frac", "deg"):
        v = np.array([0.1, 0.3])
        assert np.allclose(c.from_px("y", unit, c.to_px("y", unit, v)), v)


def test_polar_convention_counter_clockwise_on_screen_y_down():
    c = Canvas(100, 100)
    x, y = c.polar_to_px(10.0, 90.0)
    assert (x, y) == pytest.approx((50.0, 40.0))  # up on the screen is a smaller row


def test_deg_needs_viewing():
    with pytest.raises(ValueError):
        Canvas(10, 10).to_px("x", "deg", 1.0)
