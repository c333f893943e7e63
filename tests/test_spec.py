"""Spec loading: every bad input gets one clear line naming the key path or file."""

from __future__ import annotations

import pytest

from augsplit.build import open_mapping, open_spec
from augsplit.errors import GuaranteeError, SpecError
from augsplit.spec import canonical, load_spec, parse_spec, spec_hash

from specs import spec_dict


def err(data) -> str:
    with pytest.raises(SpecError) as e:
        open_mapping(data)
    text = str(e.value)
    assert "\n" not in text
    return text


def test_empty_interval_names_its_key_path():
    d = spec_dict(splits={"train": {"region": {"x": [30, 10]}, "per_class": 1}})
    assert err(d).startswith("splits.train.region.x: interval [30, 10] is empty")


def test_interval_outside_axis_range():
    d = spec_dict(splits={"train": {"region": {"x": [-5, 10]}, "per_class": 1}})
    assert "outside the axis range [0, 64]" in err(d)


def test_deg_without_viewing_geometry():
    d = spec_dict(axes={"x": {"range": [-2, 2], "unit": "deg"}})
    text = err(d)
    assert text.startswith("axes.x.unit:") and "viewing" in text


@pytest.mark.parametrize("rng", [[0, 2], [-1, 2]])
def test_scale_must_be_positive(rng):
    d = spec_dict(axes={"x": {"range": [0, 64]}, "scale": {"range": rng}})
    assert "axes.scale.range: scale must be positive" in err(d)


def test_overlapping_regions_refused_when_guarantee_says_disjoint():
    d = spec_dict(splits={"train": {"region": {"x": [0, 40]}, "per_class": 1},
                          "test": {"region": {"x": [30, 64]}, "per_class": 1}},
                  guarantees=[{"disjoint": "parameters", "between": ["train", "test"]}])
    with pytest.raises(GuaranteeError) as e:
        open_mapping(d)
    assert str(e.value).startswith("guarantees.0: the regions of train and test overlap")


def test_guarantee_naming_unknown_split():
    d = spec_dict(guarantees=[{"disjoint": "footprint", "between": ["train", "tset"]}])
    assert "unknown split 'tset'" in err(d)


@pytest.mark.parametrize("count", [0, -3, 2.5, "ten", True])
def test_counts_must_be_positive_integers(count):
    d = spec_dict(splits={"train": {"region": {"x": [0, 20]}, "per_class": count}})
    assert err(d).startswith("splits.train.per_class:")


def test_unknown_axis_with_hint():
    d = spec_dict(axes={"x": {"range": [0, 64]}, "scael": {"range": [1, 2]}})
    text = err(d)
    assert "unknown axis 'scael'" in text and "did you mean 'scale'" in text


def test_misspelt_key_with_hint():
    d = spec_dict(canvas={"width": 64, "heigth": 64})
    text = err(d)
    assert text.startswith("canvas:") and "did you mean 'height'" in text


def test_misspelt_region_key_with_hint():
    d = spec_dict(splits={"train": {"region": {"minsu": {"x": [0, 1]}}, "per_class": 1}})
    assert "did you mean 'minus'" in err(d)


def test_region_axis_not_in_spec():
    d = spec_dict(splits={"train": {"region": {"angle": [0, 10]}, "per_class": 1}})
    assert "axis 'angle' is not among the spec's axes" in err(d)


def test_yaml_not_a_mapping(tmp_path):
    p = tmp_path / "s.yaml"
    p.write_text("- just\n- a list\n")
    with pytest.raises(SpecError) as e:
        load_spec(p)
    assert str(p) in str(e.value) and "mapping" in str(e.value)


def test_tab_indented_yaml(tmp_path):
    p = tmp_path / "s.yaml"
    p.write_text("seed: 1\ncanvas:\n\twidth: 64\n")
    with pytest.raises(SpecError) as e:
        load_spec(p)
    assert f"{p}:3:" in str(e.value) and "tab" in str(e.value)


def test_truncated_yaml(tmp_path):
    p = tmp_path / "s.yaml"
    p.write_text("seed: 1\ncanvas: {width: 64, height: 6")
    with pytest.raises(SpecError) as e:
        load_spec(p)
    assert str(p) in str(e.value) and "not valid YAML" in str(e.value)


def test_yaml_is_loaded_safely(tmp_path):
    # safe_load refuses python object tags (PyYAML docs: yaml.safe_load)
    p = tmp_path / "s.yaml"
    p.write_text("seed: !!python/object/apply:os.system ['echo pwned']\n")
    with pytest.raises(SpecError):
        load_spec(p)


def test_missing_file():
    with pytest.raises(SpecError) as e:
        open_spec("/nonexistent/spec.yaml")
    assert "no such file" in str(e.value)


def test_exactly_one_count():
    d = spec_dict(splits={"train": {"region": {"x": [0, 20]}, "per_class": 1, "count": 4}})
    assert "exactly one of per_class or count" in err(d)


def test_canonical_form_and_hash_are_stable():
    a = parse_spec(spec_dict())
    reordered = dict(reversed(list(spec_dict().items())))
    b = parse_spec(reordered)
    assert canonical(a) == canonical(b) and spec_hash(a) == spec_hash(b)
    c = parse_spec(spec_dict(seed=2))
    assert spec_hash(c) != spec_hash(a)
    # defaults are filled in: writing a default explicitly changes nothing
    d = parse_spec(spec_dict(render={"alpha_threshold": 0.5}))
    assert spec_hash(d) == spec_hash(a)


def test_spec_is_immutable():
    s = parse_spec(spec_dict())
    with pytest.raises(Exception):
        s.seed = 5


def test_split_cycle_is_refused():
    d = spec_dict(splits={"a": {"region": {"split": "b"}, "per_class": 1},
                          "b": {"region": {"split": "a"}, "per_class": 1}})
    assert "cycle" in err(d)


def test_empty_region_after_difference():
    d = spec_dict(splits={"train": {"region": {"x": [0, 20], "minus": {"x": [0, 30]}}, "per_class": 1}})
    assert err(d).startswith("splits.train.region: the region is empty")


def test_composition_claim_checked():
    d = spec_dict(splits={"train": {"region": {"x": [0, 20]}, "per_class": 1},
                          "test": {"region": {"x": [44, 64]}, "per_class": 1, "kind": "composition"}})
    text = err(d)
    assert text.startswith("splits.test.kind:") and "x [44, 64] never is" in text


def test_unseen_instances_need_instances():
    d = spec_dict(objects={"kind": "polyomino", "cells": 3, "cell_px": 4, "unseen_instances": 1})
    assert "leaves none to train on" in err(d)


def test_sprite_larger_than_canvas_names_the_file(tmp_path):
    import cv2
    import numpy as np

    d = tmp_path / "sprites" / "crate"
    d.mkdir(parents=True)
    big = np.full((80, 90, 4), 255, np.uint8)
    cv2.imwrite(str(d / "a.png"), big)
    spec = spec_dict(objects={"kind": "folder", "path": str(tmp_path / "sprites")})
    from augsplit.errors import SourceError

    with pytest.raises(SourceError) as e:
        open_mapping(spec)
    assert str(d / "a.png") in str(e.value) and "larger than the 64x64 canvas" in str(e.value)


def test_order_of_splits_and_axes_is_part_of_the_hash():
    # the order fixes split indices and which uniform drives which axis: other order, other images
    a = parse_spec(spec_dict())
    d = spec_dict()
    d["splits"] = dict(reversed(list(d["splits"].items())))
    assert spec_hash(parse_spec(d)) != spec_hash(a)
    d = spec_dict()
    d["axes"] = dict(reversed(list(d["axes"].items())))
    assert spec_hash(parse_spec(d)) != spec_hash(a)
