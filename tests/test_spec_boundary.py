"""The pydantic Spec stops at the boundary: past the planner, code reads the plan's plain
frozen values (plan.seed, plan.canvas, plan.render, plan.settings), never the Spec's fields.
Checked on the source with `ast`: any `<x>.spec.<field>` or `spec.<field>` naming a Spec field."""

from __future__ import annotations

import ast
import dataclasses
from pathlib import Path

import augsplit
from augsplit.plan.settings import Settings, settings_of
from augsplit.spec import Spec

PACKAGE = Path(augsplit.__file__).parent
# where YAML / spec.json becomes values: the spec itself, building it, the planner, and the
# dataset folder (which reads and checks spec.json)
BOUNDARY = {"spec.py", "build.py", "plan/planner.py", "plan/regions.py", "plan/settings.py", "plan/warnings.py",
            "dataset/folder.py"}
FIELDS = set(Spec.model_fields) | {"model_dump"}


def spec_reads(path: Path) -> list[str]:
    out = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Attribute) and node.attr in FIELDS:
            v = node.value
            if (isinstance(v, ast.Attribute) and v.attr == "spec") or (isinstance(v, ast.Name) and v.id == "spec"):
                out.append(f"{path.relative_to(PACKAGE)}:{node.lineno} .spec.{node.attr}")
    return out


def test_nothing_past_the_planner_reads_the_spec():
    reads = [r for p in sorted(PACKAGE.rglob("*.py")) if str(p.relative_to(PACKAGE)) not in BOUNDARY
             for r in spec_reads(p)]
    assert reads == []


def test_the_walk_finds_a_read():
    sample = PACKAGE / "plan" / "settings.py"
    assert any(".spec." in r or "spec." in r for r in spec_reads(sample))  # settings_of reads them


def test_settings_are_plain_frozen_values():
    built = augsplit.open_spec("demo")
    s = built.plan.settings
    assert isinstance(s, Settings) and dataclasses.is_dataclass(s)
    assert s == settings_of(built.spec)  # made from the spec once, by the planner
    hash(s)  # frozen all the way down: hashable
    assert built.plan.seed == built.spec.seed and built.plan.render.channels == 1  # the demo is grey
    assert built.plan.render.alpha_threshold == built.spec.render.alpha_threshold
    assert [c.between for c in s.claims] == [tuple(g.between) for g in built.spec.guarantees]
