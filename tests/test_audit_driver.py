"""The audit driver: an ordered list of check objects. Every pair's results come in the list's
order, each check that does not apply is recorded once per pair with why, and the names a
check object carries are those of the results it returns."""

from __future__ import annotations

import pytest
from synthetic import AXES, make_dataset

from augsplit.audit import run_audit
from augsplit.audit.checks import PAIR_CHECKS, Check
from augsplit.audit.inputs import BBOX_COLUMNS


@pytest.fixture(scope="module")
def ds():
    return make_dataset(n_train=40, n_test=20, seed=2)


def order_of(result) -> list[str]:
    return [c.name for c in result.checks if c.pair is not None]


def test_every_check_object_names_itself_once_and_says_what_it_needs():
    kinds = [type(c) for c in PAIR_CHECKS]
    assert len(kinds) == len(set(kinds)) and all(isinstance(c, Check) and c.name for c in PAIR_CHECKS)
    # one name twice: data ranges stand in for declared regions when a pair declares none
    assert [c.name for c in PAIR_CHECKS].count("declared_regions") == 2
    by_name = {c.name: c for c in PAIR_CHECKS}
    assert set(BBOX_COLUMNS) <= set(by_name["footprint_overlap"].needs)
    assert "masks" in by_name["footprint_overlap"].uses and "images" in by_name["near_duplicates"].uses


def test_results_follow_the_list_order_and_carry_the_objects_names(ds):
    res = run_audit(ds.table, AXES, image_loader=ds.image_loader, mask_loader=ds.mask_loader)
    got = order_of(res)
    known = [c.name for c in PAIR_CHECKS]
    assert set(got) <= set(known)
    assert got == sorted(got, key=known.index)  # the list's order is the report's
    assert got[0] == "declared_regions"  # the data ranges, no regions declared
    assert {"parameter_proximity", "footprint_overlap", "row_integrity", "category_overlap",
            "near_duplicates"} <= set(got)
    assert res.checks[0].name == "finite_values"


def test_a_table_without_boxes_or_images_records_each_skipped_check_with_its_reason(ds):
    table = ds.table.drop(columns=[*BBOX_COLUMNS, "instance"], errors="ignore")
    res = run_audit(table, AXES)
    reasons = {k.name: k.reason for k in res.skipped}
    assert set(reasons) == {"footprint_overlap", "category_overlap", "near_duplicates", "instance_leakage"}
    assert reasons["footprint_overlap"].startswith("no footprints: columns bbox_x0")
    assert reasons["category_overlap"] == reasons["footprint_overlap"]
    assert "instance" in reasons["instance_leakage"] and "no images" in reasons["near_duplicates"]
    assert all(k.pair == ("train", "test") for k in res.skipped)
    assert "row_integrity" not in order_of(res)  # no mask loader: not applicable, nothing to say
    assert order_of(res) == ["declared_regions", "parameter_proximity"]
