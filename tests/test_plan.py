"""The planner: the region language, counts, holdout kinds, parameter guarantees, draws."""

from __future__ import annotations

import numpy as np
import pytest
from specs import spec_dict

from augsplit.build import open_mapping
from augsplit.errors import GuaranteeError, SpecError
from augsplit.plan.draw import draw, draw_online


def plan_of(**changes):
    return open_mapping(spec_dict(**changes)).plan


def test_counts_per_class_and_total():
    p = plan_of(splits={"train": {"region": {"x": [0, 20]}, "per_class": 3},
                        "test": {"region": {"x": [44, 64]}, "count": 5}})
    assert p.split("train").counts == (3, 3)
    assert sorted(p.split("test").counts) == [2, 3] and p.split("test").total == 5


def test_band_is_in_normalised_units_of_a_log_axis():
    p = plan_of(axes={"x": {"range": [0, 64]}, "scale": {"range": [0.5, 2.0], "dist": "log"}},
                splits={"train": {"region": {"band": {"axis": "scale", "at": [0.0, 0.5]}}, "per_class": 2},
                        "test": {"region": {"band": {"axis": "scale", "at": [0.5, 1.0]}}, "per_class": 2}})
    ax = p.space["scale"]
    lo, hi = p.split("train").region.axis_extent("scale")
    # half of a log range [0.5, 2] ends at the geometric mean, 1.0
    assert float(ax.from_t(hi)) == pytest.approx(1.0)
    assert p.split("test").kind == "extrapolation"


def test_grid_cells_region_is_the_union_of_its_cells_built_without_set_differences(monkeypatch):
    # A 40 x 40 checkerboard (800 cells) and a listed pick with a repeated cell. Reference: the
    # union taken cell by cell with Region's own `|`. Building the region itself does no
    # set difference (the cell-by-cell union did 640,000 box differences and took a minute).
    from augsplit.plan.regions import build_region
    from augsplit.space.region import Region

    p = plan_of(axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "hue": {"range": [0, 360]}})
    space, classes = p.space, p.classes
    for pick in ("checkerboard", [[3, 4], [0, 0], [3, 4], [39, 39]]):
        node = {"cells": {"grid": {"x": 40, "y": 40}, "pick": pick}}
        cells = [c for c in np.ndindex(40, 40) if sum(c) % 2 == 0] if pick == "checkerboard" else pick
        ref = Region.empty(space)
        ix, iy = space.index["x"], space.index["y"]
        x0, y0, sx, sy = space.t_lo[ix], space.t_lo[iy], space.t_span[ix], space.t_span[iy]
        for cx, cy in cells:
            ref = ref | Region.box(space, {"x": [(x0 + sx * cx / 40, x0 + sx * (cx + 1) / 40)],
                                           "y": [(y0 + sy * cy / 40, y0 + sy * (cy + 1) / 40)]})
        calls = []
        real_sub = Region.__sub__
        monkeypatch.setattr(Region, "__sub__", lambda a, b: calls.append(1) or real_sub(a, b))
        got = build_region(node, space, classes, "splits.train.region")
        monkeypatch.setattr(Region, "__sub__", real_sub)
        assert not calls
        assert np.array_equal(got.lo, ref.lo) and np.array_equal(got.hi, ref.hi)
        assert got.mass() == pytest.approx(len(set(map(tuple, cells))) / 1600)


def test_checkerboard_cells_make_a_composition_holdout():
    p = plan_of(splits={"train": {"region": {"cells": {"grid": {"x": 2, "y": 2}, "pick": "checkerboard"}}, "per_class": 2},
                        "test": {"region": {"cells": {"grid": {"x": 2, "y": 2}, "pick": "checkerboard_odd"}}, "per_class": 2}})
    tr, te = p.split("train"), p.split("test")
    assert te.kind == "composition"
    assert tr.region.mass() == pytest.approx(0.5) and te.region.mass() == pytest.approx(0.5)
    assert (tr.region & te.region).mass() == pytest.approx(0.0)
    # listed cells: the top-left cell only (x [0, 32], y [0, 32])
    q = plan_of(splits={"train": {"region": {"cells": {"grid": {"x": 2, "y": 2}, "pick": [[0, 0]]}}, "per_class": 2}})
    assert q.split("train").region.contains({"x": np.array([10.0, 40.0]), "y": np.array([10.0, 10.0]),
                                              "class": np.zeros(2)}).tolist() == [True, False]


def test_interpolation_and_random_kinds():
    p = plan_of(splits={"train": {"region": {"x": [[0, 20], [44, 64]]}, "per_class": 2},
                        "mid": {"region": {"x": [28, 36]}, "per_class": 2},
                        "iid": {"region": {"split": "train"}, "per_class": 2}})
    assert p.split("mid").kind == "interpolation"
    assert p.split("iid").kind == "random"


def test_circular_holdout_is_interpolation_and_wraps():
    p = plan_of(axes={"x": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
                splits={"train": {"region": {"angle": [30, 330]}, "per_class": 2},
                        "test": {"region": {"angle": [330, 30]}, "per_class": 2}})
    te = p.split("test")
    assert te.kind == "interpolation"
    assert te.region.mass() == pytest.approx(60 / 360)
    cols = draw(p, te, np.arange(te.total))
    assert np.all((cols["angle"] >= 330) | (cols["angle"] <= 30))


def test_by_class_regions_and_star():
    p = plan_of(objects={"kind": "polyomino", "cells": 4, "cell_px": 3},
                splits={"train": {"region": {"by_class": {"P4-00": {"x": [0, 10]}, "*": {"x": [50, 64]}}}, "per_class": 3}})
    tr = p.split("train")
    cols = draw(p, tr, np.arange(tr.total))
    first = cols["class_name"] == "P4-00"
    assert np.all(cols["x"][first] <= 10) and np.all(cols["x"][~first] >= 50)


def test_classes_restriction():
    p = plan_of(objects={"kind": "polyomino", "cells": 4, "cell_px": 3},
                splits={"train": {"region": {"x": [0, 20]}, "per_class": 2, "classes": ["P4-01", "P4-03"]}})
    assert [p.classes[c] for c, n in enumerate(p.split("train").counts) if n] == ["P4-01", "P4-03"]


def test_parameter_margin_circular_short_way_round():
    base = dict(axes={"x": {"range": [0, 64]}, "angle": {"range": [0, 360]}})
    ok = plan_of(**base, splits={"train": {"region": {"angle": [20, 340]}, "per_class": 1},
                                 "test": {"region": {"angle": [350, 10]}, "per_class": 1}},
                 guarantees=[{"disjoint": "parameters", "between": ["train", "test"], "margin": 0.02}])
    (v,) = ok.verdicts
    # 10 degrees the short way round on a 360-degree axis = 0.0278 in normalised units
    assert v.status == "proved" and v.numbers["min_distance"] == pytest.approx(10 / 360)
    with pytest.raises(GuaranteeError) as e:
        plan_of(**base, splits={"train": {"region": {"angle": [20, 340]}, "per_class": 1},
                                "test": {"region": {"angle": [350, 10]}, "per_class": 1}},
                guarantees=[{"disjoint": "parameters", "between": ["train", "test"], "margin": 0.05}])
    assert "closer than the margin 0.05" in str(e.value)


def test_parameter_auto_guard_removes_the_margin():
    p = plan_of(splits={"train": {"region": {"x": [0, 32]}, "per_class": 1},
                        "test": {"region": {"x": [32, 64]}, "per_class": 1}},
                guarantees=[{"disjoint": "parameters", "between": ["train", "test"], "margin": 0.1, "auto_guard": True}])
    lo, _ = p.split("test").region.axis_extent("x")
    assert lo == pytest.approx(32 + 6.4)  # 0.1 of the 64-px range
    assert p.verdicts[0].status == "guarded"


def test_draw_is_independent_of_which_images_are_drawn():
    p = plan_of()
    tr = p.split("train")
    all_cols = draw(p, tr, np.arange(tr.total))
    some = draw(p, tr, np.array([tr.total - 1, 0]))
    for k in ("x", "y", "class_index", "instance", "cx_px"):
        assert some[k][0] == all_cols[k][-1] and some[k][1] == all_cols[k][0]


def test_every_draw_lies_in_its_region():
    p = plan_of(axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "scale": {"range": [0.5, 2], "dist": "log"}},
                splits={"train": {"region": {"any_of": [{"x": [0, 20]}, {"y": [50, 64]}], "minus": {"x": [5, 10]}},
                                  "per_class": 200}})
    tr = p.split("train")
    cols = draw(p, tr, np.arange(tr.total))
    pts = {n: cols[n] for n in ("x", "y", "scale")}
    pts["class"] = cols["class_index"]
    assert tr.region.contains(pts).all()
    on = draw_online(p, tr, np.random.default_rng(0).random((500, p.space.ndim + 3)))
    pts = {n: on[n] for n in ("x", "y", "scale")}
    pts["class"] = on["class_index"]
    assert tr.region.contains(pts).all()


def test_draw_index_out_of_range():
    p = plan_of()
    with pytest.raises(IndexError):
        draw(p, "train", [p.split("train").total])


def test_keep_inside_keeps_whole_object_on_canvas():
    from augsplit.render import RenderParams, footprint

    built = open_mapping(spec_dict(render={"keep_inside": True},
                                   axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]},
                                         "scale": {"range": [1, 2]}, "angle": {"range": [0, 360]}},
                                   splits={"train": {"per_class": 100}}))
    p = built.plan
    tr = p.split("train")
    cols = draw(p, tr, np.arange(tr.total))
    for i in range(tr.total):
        sp = built.source.sprite(int(cols["class_index"][i]), int(cols["instance"][i]))
        fp = footprint(sp, RenderParams(cols["cx_px"][i], cols["cy_px"][i], cols["scale"][i], cols["angle"][i]), (64, 64))
        assert fp.visible_fraction == 1.0


def test_keep_inside_with_no_room_names_the_class():
    with pytest.raises(SpecError) as e:
        open_mapping(spec_dict(canvas={"width": 12, "height": 12}, render={"keep_inside": True},
                               objects={"kind": "polyomino", "cells": 3, "cell_px": 4},
                               axes={"x": {"range": [0, 12]}},
                               splits={"train": {"per_class": 1}}))
    assert "keep_inside leaves no legal position for class 'P3-0" in str(e.value)


def test_stratified_split_fills_every_cell_equally():
    # unequal cells: a 1x3 grid picking cells of different widths after a minus
    p = plan_of(splits={"train": {"region": {"x": [0, 64], "minus": {"x": [8, 40]}}, "per_class": 30, "stratify": True},
                        "plain": {"region": {"x": [0, 64], "minus": {"x": [8, 40]}}, "per_class": 3000}})
    tr = p.split("train")
    cols = draw(p, tr, np.arange(tr.total))
    counts = np.bincount(cols["cell"], minlength=tr.region.nbox)
    assert tr.region.nbox == 2 and counts.tolist() == [30, 30]  # 15 per class per cell
    pts = {"x": cols["x"], "y": cols["y"], "class": cols["class_index"]}
    assert tr.region.contains(pts).all()
    # without stratification the cells fill in proportion to their mass (8 px vs 24 px wide)
    pl = p.split("plain")
    share = np.bincount(draw(p, pl, np.arange(pl.total))["cell"]) / pl.total
    assert share[0] == pytest.approx(8 / 32, abs=0.03)


def test_split_defined_by_reference_follows_an_auto_guarded_split():
    p = plan_of(axes={"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
                objects={"kind": "polyomino", "cells": 4, "cell_px": 4},
                splits={"train": {"region": {"y": [0, 26]}, "per_class": 2},
                        "test": {"region": {"y": [30, 64]}, "per_class": 2},
                        "test_copy": {"region": {"split": "test"}, "per_class": 2}},
                guarantees=[{"disjoint": "footprint", "between": ["train", "test"], "auto_guard": True}])
    test, copy = p.split("test").region, p.split("test_copy").region
    assert p.verdicts[0].status == "guarded"
    assert (test - copy).mass() == pytest.approx(0) and (copy - test).mass() == pytest.approx(0)


def test_unseen_instances_without_a_holdout_is_a_spec_error_even_under_a_guarantee():
    with pytest.raises(SpecError) as e:
        plan_of(splits={"train": {"region": {"x": [0, 20]}, "per_class": 1, "instances": "unseen"},
                        "test": {"region": {"x": [44, 64]}, "per_class": 1}},
                guarantees=[{"disjoint": "footprint", "between": ["train", "test"]}])
    assert str(e.value).startswith("splits.train.instances: no instances are held out")
