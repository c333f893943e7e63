"""Scenes with distractors: the same bytes as drawing each attempt on its own, with less work.

`_reference_scene` is the earlier construction, kept here as the reference: every attempt
drew its own row of uniforms with a one-row `draw_online` call and made a footprint whether
or not `no_overlap` needed it. The package now draws a scene's distractors in batches. Both
must give byte-identical images and identical distractor rows over many images. Reference
for "identical": numpy.array_equal on the uint8 pixels and == on the rows.
"""

from __future__ import annotations

import numpy as np
import pytest

from augsplit import scene as scene_mod
from augsplit.build import open_mapping
from augsplit.plan.draw import draw, draw_online
from augsplit.render import footprint, masks_overlap, render
from augsplit.scene import PARAM_KEYS, make_scene, placed_columns, render_params
from augsplit.space.streams import RENDER, lazy_image_rng


def _reference_scene(plan, source, background, split, row):
    spec = plan.spec
    h, w = spec.canvas.height, spec.canvas.width
    channels = 1 if spec.canvas.mode == "gray" else 3
    thr = spec.render.alpha_threshold
    rng = lazy_image_rng(spec.seed, split.index, int(row["index"]), RENDER)
    bg = background.draw(rng, h, w, channels)
    target = (source.sprite(int(row["class_index"]), int(row["instance"])), render_params(row))
    placements = [target]
    extra = []
    d = spec.render.distractors
    if d.count[1] > 0:
        want = int(rng.integers(d.count[0], d.count[1] + 1))
        taken = [footprint(target[0], target[1], (h, w), thr)]
        for _ in range(want):
            for _attempt in range(d.attempts):
                u = rng.random((1, plan.space.ndim + 3))
                cols = draw_online(plan, split, u)
                r = {k: v[0] for k, v in cols.items()}
                sp, rp = source.sprite(int(r["class_index"]), int(r["instance"])), render_params(r)
                fp = footprint(sp, rp, (h, w), thr)
                if d.no_overlap and any(masks_overlap(fp, t) for t in taken):
                    continue
                taken.append(fp)
                placements.append((sp, rp))
                extra.append(r)
                break
    image, placed = render(bg, placements, thr)
    rows = [{"k": k, "class_name": r["class_name"], "class_index": int(r["class_index"]),
             "instance": int(r["instance"]), **{key: r[key] for key in PARAM_KEYS}, **placed_columns(p)}
            for k, (r, p) in enumerate(zip(extra, placed[1:]))]
    return image, rows


def _spec(count, no_overlap, background, mode="rgb", attempts=50):
    return {"seed": 11, "canvas": {"width": 64, "height": 64, "mode": mode},
            "objects": {"kind": "polyomino", "cells": 4, "cell_px": 4},
            "background": background,
            "render": {"distractors": {"count": count, "no_overlap": no_overlap, "attempts": attempts}},
            "axes": {"x": {"range": [6, 58]}, "y": {"range": [6, 58]}, "scale": {"range": [0.7, 1.6], "dist": "log"},
                     "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}, "mirror": {"levels": [0, 1]}},
            "splits": {"train": {"region": {"x": [6, 30]}, "per_class": 12},
                       "test": {"region": {"x": [34, 58]}, "per_class": 6}}}


CASES = [
    ([0, 5], False, {"kind": "solid", "value": 0.3}, "rgb", 50),
    ([5, 5], True, {"kind": "pink_noise", "mean": 0.5, "contrast": 0.2}, "rgb", 50),
    ([2, 8], True, {"kind": "gaussian_noise", "mean": 0.5, "sd": 0.1}, "gray", 3),  # many attempts fail
    ([1, 3], False, {"kind": "uniform_noise"}, "gray", 1),
]


@pytest.mark.parametrize("count,no_overlap,background,mode,attempts", CASES)
def test_batched_distractors_give_the_bytes_of_one_draw_per_attempt(count, no_overlap, background, mode, attempts):
    built = open_mapping(_spec(count, no_overlap, background, mode, attempts))
    plan = built.plan
    placed = 0
    for split in plan.splits:
        cols = draw(plan, split, np.arange(sum(split.counts)))
        for i in range(len(cols["index"])):
            row = {k: v[i] for k, v in cols.items()}
            got = make_scene(plan, built.source, built.background, split, row)
            image, rows = _reference_scene(plan, built.source, built.background, split, row)
            assert np.array_equal(got.image, image), f"{split.name} image {i}: pixels differ"
            assert got.distractors == rows, f"{split.name} image {i}: distractor rows differ"
            placed += len(rows)
    assert placed > 0


def test_one_draw_per_scene_and_no_footprints_without_no_overlap(monkeypatch):
    # The work a scene does: every distractor of a scene comes from one draw_placements call when
    # no attempt is refused, and footprints are made only when no_overlap needs them.
    calls = {"draw_placements": 0, "footprint": 0}

    def counted(name, fn):
        def wrapper(*a, **k):
            calls[name] += 1
            return fn(*a, **k)
        return wrapper

    monkeypatch.setattr(scene_mod, "draw_placements", counted("draw_placements", scene_mod.draw_placements))
    monkeypatch.setattr(scene_mod, "footprint", counted("footprint", scene_mod.footprint))
    built = open_mapping(_spec([5, 5], False, {"kind": "solid", "value": 0.3}))
    split = built.plan.split("train")
    cols = draw(built.plan, split, np.arange(10))
    for i in range(10):
        s = make_scene(built.plan, built.source, built.background, split, {k: v[i] for k, v in cols.items()})
        assert len(s.distractors) == 5
    assert calls == {"draw_placements": 10, "footprint": 0}


def test_scenes_made_together_map_their_first_draws_in_one_call(monkeypatch):
    # make_scenes (how generate renders a row group): the first distractor draws of every
    # scene in a batch go through one draw_placements call; the images are make_scene's
    calls = []
    real = scene_mod.draw_placements
    monkeypatch.setattr(scene_mod, "draw_placements", lambda *a, **k: calls.append(len(a[2])) or real(*a, **k))
    built = open_mapping(_spec([5, 5], False, {"kind": "solid", "value": 0.3}))
    split = built.plan.split("train")
    cols = draw(built.plan, split, np.arange(10))
    rows = [{k: v[i] for k, v in cols.items()} for i in range(10)]
    scenes = list(scene_mod.make_scenes(built.plan, built.source, built.background, split, rows))
    assert calls == [50]
    for row, s in zip(rows, scenes):
        one = make_scene(built.plan, built.source, built.background, split, row)
        assert np.array_equal(s.image, one.image) and s.distractors == one.distractors
