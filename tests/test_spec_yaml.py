"""Reading spec YAML: the same values as PyYAML's safe_load (the reference), duplicate keys
refused with file:line, aliases bounded, and every spec error pointing at its line."""

from __future__ import annotations

import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.build import open_spec
from augsplit.errors import SpecError
from augsplit.spec import load_spec, read_spec_file, read_yaml, spec_hash

from specs import BASE, write_spec

KEYS = st.text("abcxyz_", min_size=1, max_size=5)
SCALARS = st.one_of(st.integers(-1000, 1000), st.floats(-1e6, 1e6, allow_nan=False), st.booleans(),
                    st.text("abc ", max_size=4), st.none())
DOCS = st.recursive(SCALARS, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                      st.dictionaries(KEYS, inner, max_size=4)), max_leaves=20)


def _paths(v, prefix=""):
    if isinstance(v, dict):
        for k, x in v.items():
            p = f"{prefix}.{k}" if prefix else k
            yield p, k
            yield from _paths(x, p)
    elif isinstance(v, list):
        for i, x in enumerate(v):
            yield from _paths(x, f"{prefix}.{i}" if prefix else str(i))


@settings(max_examples=60, deadline=None)
@given(doc=st.dictionaries(KEYS, DOCS, min_size=1, max_size=4), flow=st.booleans())
def test_values_equal_pyyaml_safe_load_and_every_key_has_its_line(tmp_path_factory, doc, flow):
    p = tmp_path_factory.mktemp("y") / "doc.yaml"
    text = yaml.safe_dump(doc, default_flow_style=flow, sort_keys=False)
    p.write_text(text)
    f = read_spec_file(p)
    assert f.data == yaml.safe_load(text)  # PyYAML's own safe loader is the reference
    lines = text.splitlines()
    for path, key in _paths(doc):
        assert path in f.lines
        assert key in lines[f.lines[path] - 1]


def test_duplicate_keys_are_refused_with_both_lines(tmp_path):
    p = tmp_path / "s.yaml"
    p.write_text("seed: 1\ncanvas: {width: 64, height: 64}\nseed: 99\n")
    with pytest.raises(SpecError) as e:
        read_yaml(p)
    assert str(e.value).startswith(f"{p}:3: seed: duplicate key 'seed' (first given at line 1)")


def test_merge_keys_override_without_being_duplicates(tmp_path):
    # YAML 1.1 merge keys (<<): explicit keys override merged ones; that is not a duplicate
    text = yaml.safe_dump({k: v for k, v in BASE.items() if k != "splits"}, sort_keys=False) + (
        "splits:\n"
        "  train: &t {region: {x: [0, 20]}, per_class: 2}\n"
        "  test: {<<: *t, region: {x: [44, 64]}}\n")
    p = tmp_path / "s.yaml"
    p.write_text(text)
    spec, _ = load_spec(p)
    assert spec.splits["test"].region == {"x": [44, 64]} and spec.splits["test"].per_class == 2
    f = read_spec_file(p)
    assert f.lines["splits.test.per_class"] == f.lines["splits.train.per_class"]  # where the merged key is written


def test_schema_errors_name_file_line_and_key_path(tmp_path):
    d = {**BASE, "splits": {"train": {"region": {"x": [0, 20]}, "per_class": 0}}}
    p = write_spec(tmp_path, d)
    line = next(i for i, t in enumerate(p.read_text().splitlines(), 1) if "per_class" in t)
    for entry in (load_spec, open_spec):
        with pytest.raises(SpecError) as e:
            entry(p)
        assert str(e.value).startswith(f"{p}:{line}: splits.train.per_class: ")


def test_plan_errors_name_file_line_too(tmp_path):
    d = {**BASE, "splits": {"train": {"region": {"x": [30, 10]}, "per_class": 1}}}
    p = write_spec(tmp_path, d)
    with pytest.raises(SpecError) as e:
        open_spec(p)
    line = int(str(e.value).split(":")[1])
    assert str(e.value).startswith(f"{p}:{line}: splits.train.region.x: interval [30, 10] is empty")
    assert "x:" in p.read_text().splitlines()[line - 1]


def test_in_memory_specs_keep_plain_key_paths():
    from augsplit.build import open_mapping

    with pytest.raises(SpecError) as e:
        open_mapping({**BASE, "seed": -1})
    assert e.value.where == "seed"


def test_duplicates_change_no_hash_silently(tmp_path):
    # measured on main: appending `seed: 99` to a spec changed its hash with exit 0
    p = write_spec(tmp_path, BASE)
    h = spec_hash(load_spec(p)[0])
    p.write_text(p.read_text() + "seed: 99\n")
    with pytest.raises(SpecError, match="duplicate key 'seed'"):
        load_spec(p)
    assert spec_hash(load_spec(write_spec(tmp_path, BASE))[0]) == h


def test_aliases_are_expanded_within_the_limit(tmp_path, monkeypatch):
    text = "a: &x [1, 2, 3]\nb: [*x, *x, *x]\n"  # 1 + 2 keys + (1 + 3) + (1 + 3 x 4) nodes = 20
    p = tmp_path / "s.yaml"
    p.write_text(text)
    monkeypatch.setattr("augsplit.limits.MAX_YAML_NODES", 20)
    assert read_yaml(p) == {"a": [1, 2, 3], "b": [[1, 2, 3]] * 3}
    monkeypatch.setattr("augsplit.limits.MAX_YAML_NODES", 19)
    with pytest.raises(SpecError, match="more than 19 nodes"):
        read_yaml(p)
