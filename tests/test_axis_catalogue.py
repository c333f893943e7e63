"""The axis catalogue (augsplit.space.axes.BUILTIN) is the one list of axes: every consumer
covers every axis, the class-axis name and the seed-stream domains are defined once, and
every "how far a sprite reaches" agrees with the one definition (plan.geometry.reach)."""

from __future__ import annotations

import ast
import dataclasses
import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import augsplit
from augsplit import albu, manifest, paramlog, scene, score
from augsplit.plan import draw
from augsplit.plan.envelope import alpha_radius
from augsplit.plan.geometry import bilinear_reach, reach, support_radius
from augsplit.render import RenderParams
from augsplit.score import inputs as score_inputs
from augsplit.scene import native_diameter
from augsplit.sources.base import ALPHA_THRESHOLD, Sprite
from augsplit.space import axes as cat

AXES = [k for k in cat.BUILTIN.values() if k.name != cat.CLASS]
PACKAGE = Path(augsplit.__file__).parent


def test_the_catalogue_describes_every_axis_completely():
    assert [k.name for k in AXES] == ["x", "y", "eccentricity", "polar_angle", "scale", "angle", "hue",
                                      "saturation", "brightness", "mirror"]
    for k in AXES:
        assert k.measure in cat.MEASURES and k.units and k.doc
        assert k.pixels in (cat.GEOMETRY, cat.COLOUR)
        assert k.distance in cat.DISTANCES
        assert isinstance(getattr(pa, k.dtype)(), pa.DataType)


@pytest.mark.parametrize("k", AXES, ids=lambda k: k.name)
def test_every_consumer_covers_the_axis(k):
    # manifest: a column of the catalogue's type and unit
    col = {c.name: c for c in manifest.IMAGE_COLUMNS}[k.column]
    assert k.column in manifest.AXIS_COLUMNS and col.type == getattr(pa, k.dtype)()
    assert col.unit in k.units or (col.unit == "spec" and len(k.units) > 1)
    # draw: a default for every non-position axis, positions derived from the centre
    assert (k.name in draw.DEFAULTS) != (k.name in draw.POSITION)
    if k.name in draw.DEFAULTS:
        assert draw.DEFAULTS[k.name] == k.default
    # renderer: a RenderParams field (or the centre, for positions) with the catalogue's default
    fields = {f.name: f.default for f in dataclasses.fields(RenderParams)}
    if k.render_param:
        assert k.render_param in scene.PARAM_KEYS and fields[k.render_param] == k.default
        # ... and the distractor table records it, as the image table does
        assert {c.name: c.type for c in manifest.DISTRACTOR_COLUMNS}[k.column] == col.type
    else:
        assert k.name in draw.POSITION and {"cx_px", "cy_px"} <= set(scene.PARAM_KEYS)
    # albu: exactly one of the geometry / colour lists
    assert (k.name in albu.GEOMETRY_AXES) != (k.name in albu.COLOUR_AXES)
    # score: read from the manifest and scored (positions through the rendered centre)
    assert k.column in score_inputs.MANIFEST_COLUMNS
    scored = {c for a in score.DISTANCE_AXES for c in a.columns} | {v.column for v in score.VALUE_AXES}
    assert k.name in scored or k.name in draw.POSITION and {"cx_px", "cy_px"} <= scored
    # parameter log: the same column and type as the manifest
    assert k.column in paramlog.SHARED_COLUMNS
    assert paramlog.LOG_SCHEMA.field(k.column).type == col.type


def test_render_params_are_exactly_the_catalogue_ones():
    fields = [f.name for f in dataclasses.fields(RenderParams)]
    assert set(fields) == {"cx", "cy"} | {k.render_param for k in AXES if k.render_param}
    assert set(scene.PARAM_KEYS) == {"cx_px", "cy_px"} | {k.render_param for k in AXES if k.render_param}


def _assigned_names(path: Path) -> set[str]:
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Assign):
            for t in node.targets:
                for n in (t.elts if isinstance(t, ast.Tuple) else [t]):
                    if isinstance(n, ast.Name):
                        out.add(n.id)
    return out


@pytest.mark.parametrize("name", ["CLASS", "ONLINE", "PLUGIN", "PARAMS", "RENDER"])
def test_constants_are_defined_once(name):
    owners = sorted(str(p.relative_to(PACKAGE)) for p in PACKAGE.rglob("*.py") if name in _assigned_names(p))
    assert len(owners) == 1, owners


def test_seed_domains_are_distinct():
    from augsplit.space import streams as s

    # spawn keys of different lengths or first items never coincide (numpy SeedSequence docs)
    assert len({s.PARAMS, s.RENDER}) == 2 and s.ONLINE != s.PLUGIN
    assert s.online_rng(1, 0, 0, 0, s.PARAMS).random() != s.image_rng(1, 0, 0, s.PARAMS).random()
    assert s.plugin_rng(1, 0, 0, 0).random() != s.online_rng(1, 0, 0, 0, s.PARAMS).random()


# ---- one definition of reach ---------------------------------------------------------------

masks = st.integers(1, 9).flatmap(lambda h: st.integers(1, 9).flatmap(
    lambda w: st.lists(st.integers(0, 255), min_size=h * w, max_size=h * w).map(
        lambda v: np.array(v, dtype=np.uint8).reshape(h, w))))


def _sprite(alpha: np.ndarray) -> Sprite:
    rgba = np.zeros(alpha.shape + (4,), np.uint8)
    rgba[..., 3] = alpha
    rgba[..., 0] = 200
    return Sprite(rgba, (alpha.shape[1] / 2.0, alpha.shape[0] / 2.0), "c", 0, 0)


def _brute(alpha_mask: np.ndarray, anchor, grow) -> float:
    """Farthest corner by plain loops (independent of the vectorised code)."""
    best = 0.0
    for r, c in zip(*np.nonzero(alpha_mask)):
        for x in (c - grow, c + 1 + grow):
            for y in (r - grow, r + 1 + grow):
                best = max(best, math.hypot(x - anchor[0], y - anchor[1]))
    return best


@settings(max_examples=60, deadline=None)
@given(masks, st.sampled_from([0.0, 0.25, 0.5, 0.9]))
def test_every_reach_convention_is_the_one_definition(alpha, thr):
    sp = _sprite(alpha)
    above, any_alpha = alpha > ALPHA_THRESHOLD * 255, alpha > 0
    assert sp.radius == pytest.approx(_brute(above, sp.anchor, 0.0))
    assert sp.radius == reach(above, sp.anchor)
    assert native_diameter(sp, thr) == pytest.approx(2 * _brute(alpha > thr * 255, sp.anchor, 0.0))
    assert alpha_radius(sp) == pytest.approx(_brute(any_alpha, sp.anchor, 0.5))
    if any_alpha.any():
        assert support_radius(sp.rgba, sp.anchor, thr) == pytest.approx(
            _brute(any_alpha, sp.anchor, -0.5) + bilinear_reach(thr))
        # the bounds nest: what is visible lies inside the proof bound, which (for any
        # threshold) lies inside the zero-alpha bound grown by the bilinear disc
        assert native_diameter(sp, max(thr, 1e-9)) / 2 <= support_radius(sp.rgba, sp.anchor, thr) + 1e-9
        assert support_radius(sp.rgba, sp.anchor, thr) <= alpha_radius(sp) + math.sqrt(2) + 1e-9
    h, w = alpha.shape
    assert albu.corner_radius(sp.anchor, (h, w)) == pytest.approx(_brute(np.ones((h, w), bool), sp.anchor, 0.5))
