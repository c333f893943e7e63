"""Region, instance and category checks on small hand-made inputs with known answers."""

import numpy as np
import pytest

from augsplit.audit.category import box_iou, check_category_overlap, mask_iou
from augsplit.audit.instances import check_instances
from augsplit.audit.proximity import AxisScale
from augsplit.audit.regions import check_data_ranges, check_declared_regions, covering_arc
from augsplit.space import Axis, Region, Space


def test_declared_regions_joint_vs_marginal_overlap():
    # A composition holdout: every marginal interval is shared, the joint cell is not.
    space = Space([Axis("x", 0, 1), Axis("y", 0, 1)])
    cell = Region.box(space, {"x": [(0.5, 1.0)], "y": [(0.5, 1.0)]})
    train = Region.full(space) - cell
    res = check_declared_regions(train, cell, pair=("train", "test"))
    assert res.verdict == "pass" and res.numbers["joint_overlap_mass"] == 0
    assert res.numbers["per_axis"]["x"]["overlap_fraction_of_axis"] == pytest.approx(0.5)
    both = check_declared_regions(Region.full(space), cell)
    assert both.verdict == "fail" and both.numbers["joint_overlap_mass"] == pytest.approx(0.25)
    pts = {"x": np.array([0.1, 0.7]), "y": np.array([0.1, 0.8])}  # second train point inside the test cell
    res = check_declared_regions(train, cell, pts, None, pair=("train", "test"))
    assert res.verdict == "fail" and res.numbers["n_a_inside_other_region"] == 1 and res.worst["row"].tolist() == [1]


def test_data_ranges_on_a_circle_use_the_short_arc():
    # from memory: the smallest arc holding points at 350, 10 deg spans 20 deg across 0.
    start, length = covering_arc(np.array([350, 10, 0]) / 360)
    assert start == pytest.approx(350 / 360) and length == pytest.approx(20 / 360)
    s = [AxisScale("angle", 0, 360, True), AxisScale("x", 0, 10)]
    a = np.array([[350, 1.0], [10, 2.0]]); b = np.array([[180, 1.5], [200, 1.8]])
    res = check_data_ranges(a, b, s)
    assert res.verdict == "pass" and res.numbers["per_axis"]["angle"]["overlap"] is False
    b2 = np.array([[5, 1.5], [200, 1.8]])
    assert check_data_ranges(a, b2, s).verdict == "warn"


def test_instances_leak_and_flagged_train_rows():
    res = check_instances(["a", "a", "b"], [0, 1, 0], ["a", "b", "b"], [1, 2, 0], [False, False, True])
    assert res.verdict == "fail" and res.numbers["leaked"] == [{"class": "a", "instance": 1}]
    assert res.worst["train_row"].tolist() == [1]
    ok = check_instances(["a"], [0], ["a", "b"], [1, 0], [False, True])
    assert ok.verdict == "pass" and ok.numbers["n_unseen_instances"] == 1
    flagged = check_instances(["a"], [0], ["a"], [0], [True], train_seen=[False])
    assert flagged.verdict == "fail" and flagged.numbers["n_train_rows_flagged_unseen"] == 1


def test_iou_helpers_against_hand_values():
    # hand computed: two 2x2 boxes sharing one pixel -> IoU 1/7
    assert box_iou(np.array([[0, 0, 2, 2]]), np.array([[1, 1, 3, 3]]))[0] == pytest.approx(1 / 7)
    m = np.array([[True, False], [True, True]])
    assert mask_iou((0, 0, 2, 2), m, (0, 0, 2, 2), None) == pytest.approx(3 / 4)


def test_category_ratio_tells_easy_from_hard():
    rng = np.random.default_rng(0)
    cls = np.array(["p", "q"] * 100)

    def boxes(x_of):
        return np.array([[x_of(c), 0, x_of(c) + 10, 10] for c in cls])
    # easy: each class at its own place in both splits (same class coincides, classes apart)
    own = boxes(lambda c: 0 if c == "p" else 20)
    easy = check_category_overlap(own, cls, own.copy(), cls, rng, (32, 32))
    assert easy.numbers["mean_iou_same_class_across"] == 1.0 and easy.numbers["mean_iou_diff_class_within"] == 0.0
    assert "easy" in easy.detail and easy.numbers["ratio"] is None  # infinite: written as null
    # hard: both classes together in each split, the splits in different places
    left, right = boxes(lambda c: 0), boxes(lambda c: 20)
    hard = check_category_overlap(left, cls, right, cls, rng, (32, 32))
    assert hard.numbers["mean_iou_same_class_across"] == 0.0 and hard.numbers["mean_iou_diff_class_within"] == 1.0
    assert hard.numbers["ratio"] == 0.0 and "hard" in hard.detail
    # ratio 1: everything in one place
    same = check_category_overlap(left, cls, left.copy(), cls, rng, (32, 32), max_ratio=0.5)
    assert same.numbers["ratio"] == pytest.approx(1.0) and same.verdict == "fail"
