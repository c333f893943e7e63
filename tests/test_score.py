"""Scoring: statistics against references, distances against brute force, reports end to end."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.spatial.distance import cdist

from augsplit import score as S

CLASSES = ("bar", "ell", "sq", "tee")


def make_manifest(rng, n_train=200, n_test=120, test_x=(40.0, 60.0)) -> pd.DataFrame:
    """A small manifest: training centres in the left lane, the held-out split in the right."""
    rows = []
    for split, xr, n in (("train", (4.0, 28.0), n_train), ("test_far", test_x, n_test)):
        for i in range(n):
            c = i % len(CLASSES)
            rows.append(dict(image_id=f"{split}-{i:07d}", split=split, class_name=CLASSES[c], class_index=c,
                             cell=i % 2, cx_px=rng.uniform(*xr), cy_px=rng.uniform(4, 60),
                             x_deg=np.nan, y_deg=np.nan, scale=float(np.exp(rng.uniform(-0.3, 0.3))),
                             angle=rng.uniform(0, 360), hue=0.0))
    return pd.DataFrame(rows)


def predictions_with(manifest, correct: np.ndarray) -> pd.DataFrame:
    truth = manifest["class_index"].to_numpy()
    pred = np.where(correct, truth, (truth + 1) % len(CLASSES))
    return pd.DataFrame({"image_id": manifest["image_id"], "predicted": [CLASSES[i] for i in pred]})


def write_manifest(tmp_path, manifest):
    """Lay the table out as a finished dataset folder: spec.json (a spec with these splits),
    one part file per split in the project's schema, and dataset.json."""
    from augsplit import manifest as mf
    from augsplit.dataset import layout as lay
    from augsplit.io import write_text_atomic
    from augsplit.spec import canonical, parse_spec, spec_hash

    root = tmp_path / "ds"
    names = list(pd.unique(manifest["split"]))
    spec = parse_spec({"seed": 1, "canvas": {"width": 64, "height": 64, "mode": "gray"},
                       "objects": {"kind": "polyomino", "cells": 3, "cell_px": 4}, "axes": {"x": {"range": [0, 64]}},
                       "splits": {n: {"region": {"x": [0, 64]}, "count": 1} for n in names}})
    h = spec_hash(spec)
    meta = mf.file_metadata(canonical(spec), h)
    for split_index, (split, g) in enumerate(manifest.groupby("split", sort=False)):
        cols = {c: g[c].to_numpy() for c in g.columns if c != "split"}
        cols.setdefault("index", np.arange(len(g)))
        cols.setdefault("split_index", np.full(len(g), split_index))
        path = lay.part_path(root, lay.MANIFEST_DIR, split, 0)
        path.parent.mkdir(parents=True)
        pq.write_table(mf.to_table(cols, mf.IMAGE_SCHEMA, meta), path)
    write_text_atomic(root / lay.SPEC_FILE, json.dumps({"spec_hash": h, "spec": spec.model_dump(mode="json"),
                                                        "layout": {"shard_size": 1 << 30}}))
    splits = {n: {"images": int((manifest["split"] == n).sum())} for n in names}
    write_text_atomic(root / lay.SUMMARY_FILE, json.dumps({"spec_hash": h, "splits": splits}))
    return root


# ---------------------------------------------------------------- statistics


@settings(max_examples=200, deadline=None)
@given(n=st.integers(1, 5000), frac=st.floats(0, 1), conf=st.sampled_from([0.8, 0.9, 0.95, 0.99]))
def test_wilson_interval_equals_scipy(n, frac, conf):
    # Reference: Wilson (1927) score interval as implemented by
    # scipy.stats.binomtest(k, n).proportion_ci(method="wilson").
    k = int(round(frac * n))
    lo, hi = S.wilson_interval(k, n, conf)
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=conf, method="wilson")
    assert lo == pytest.approx(ref.low, abs=1e-12)
    assert hi == pytest.approx(ref.high, abs=1e-12)


def test_wilson_interval_vectorised_and_empty():
    # Wilson (1927); an empty cell has no interval rather than a made-up one.
    lo, hi = S.wilson_interval(np.array([0, 3, 10]), np.array([0, 10, 10]))
    assert np.isnan(lo[0]) and np.isnan(hi[0])
    ref = stats.binomtest(3, 10).proportion_ci(method="wilson")
    assert (lo[1], hi[1]) == pytest.approx((ref.low, ref.high), abs=1e-12)
    assert hi[2] == 1.0


def test_bootstrap_mean_covers_normal_interval():
    # Efron & Tibshirani (1993): on a large sample the percentile bootstrap interval of a mean
    # agrees with the analytic normal interval mean +- z * s / sqrt(n).
    rng = np.random.default_rng(1)
    x = rng.exponential(2.0, 4000)  # skewed on purpose: the CLT still holds at this n
    lo, hi = S.bootstrap_mean_ci(x, n_boot=4000, rng=np.random.default_rng(2))
    half = stats.norm.ppf(0.975) * x.std(ddof=1) / np.sqrt(x.size)
    assert lo == pytest.approx(x.mean() - half, abs=0.1 * half)
    assert hi == pytest.approx(x.mean() + half, abs=0.1 * half)


def test_bootstrap_gap_matches_normal_interval_of_a_difference():
    # Efron & Tibshirani (1993) again, for the gap: the analytic reference is the normal interval of
    # a difference of two independent proportions, p1 - p2 +- z * sqrt(p1 q1 / n1 + p2 q2 / n2).
    rng = np.random.default_rng(3)
    a = rng.random(6000) < 0.9
    b = rng.random(3000) < 0.4
    gap, lo, hi = S.bootstrap_gap(a, b, n_boot=6000, rng=np.random.default_rng(4))
    p1, p2 = a.mean(), b.mean()
    half = stats.norm.ppf(0.975) * np.sqrt(p1 * (1 - p1) / a.size + p2 * (1 - p2) / b.size)
    assert gap == pytest.approx(p1 - p2)
    assert lo == pytest.approx(gap - half, abs=0.1 * half)
    assert hi == pytest.approx(gap + half, abs=0.1 * half)


def test_bootstrap_gap_is_reproducible_from_its_seed():
    # common practice, no source: a fixed seed gives the same interval twice
    a, b = np.arange(100) % 3 == 0, np.arange(80) % 2 == 0
    r1 = S.bootstrap_gap(a, b, rng=np.random.default_rng(7))
    r2 = S.bootstrap_gap(a, b, rng=np.random.default_rng(7))
    assert r1 == r2


def test_chance_bounds_hold_a_guessers_accuracy():
    # binomial central interval from scipy.stats.binom.interval
    lo, hi = S.chance_bounds(400, 0.25)
    assert lo < 0.25 < hi
    assert (lo, hi) == pytest.approx(tuple(np.array(stats.binom.interval(0.95, 400, 0.25)) / 400))


def test_expected_calibration_error_by_hand_and_on_calibrated_draws():
    # Definition (Naeini et al., 2015; Guo et al., 2017): sum over bins ((m-1)/M, m/M] of
    # (n_b / n) |acc_b - conf_b|. Worked by hand: bin (0.9, 1]: acc 0.5, conf 0.95 -> 0.45 * 2/4;
    # bin (0.5, 0.6]: acc 1, conf 0.55 -> 0.45 * 2/4; total 0.45.
    assert S.expected_calibration_error([0.95, 0.95, 0.55, 0.55], [1, 0, 1, 1]) == pytest.approx(0.45)
    # a forecaster whose hit rate equals its confidence is calibrated: ECE near 0
    rng = np.random.default_rng(8)
    conf = rng.uniform(0.2, 1.0, 40_000)
    assert S.expected_calibration_error(conf, rng.random(conf.size) < conf) < 0.015
    # and one that is 20 points overconfident everywhere has ECE near 0.2
    assert S.expected_calibration_error(conf, rng.random(conf.size) < conf - 0.2) == pytest.approx(0.2, abs=0.02)


def test_calibration_is_reported_when_probabilities_are_given(tmp_path):
    m = make_manifest(np.random.default_rng(6), 40, 40)
    truth = m["class_index"].to_numpy()
    p = np.full((len(m), 4), 0.1)
    p[np.arange(len(m)), truth] = 0.7
    path = tmp_path / "p.csv"
    pd.DataFrame({"image_id": m["image_id"], **{f"prob_{c}": p[:, i] for i, c in enumerate(CLASSES)}}).to_csv(path, index=False)
    r = S.score(m, S.load_predictions(path))
    # every prediction right at confidence 0.7: ECE = |1 - 0.7| (Guo et al., 2017)
    assert r.by_split["ece"].to_numpy() == pytest.approx(0.3)
    assert r.by_split["mean_confidence"].to_numpy() == pytest.approx(0.7)


# ---------------------------------------------------------------- distances


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-720, 720), min_size=1, max_size=40), st.lists(st.floats(-720, 720), min_size=1, max_size=40))
def test_circular_distance_is_the_short_way_round(train, query):
    # reference: brute force over all pairs, d = min(|a - b| mod 360, 360 - |a - b| mod 360)
    t, q = np.array(train), np.array(query)
    diff = np.mod(np.abs(q[:, None] - t[None, :]), 360.0)
    ref = np.minimum(diff, 360.0 - diff).min(1)
    got = S.nearest_distance(t, q, "circular")
    assert got == pytest.approx(ref, abs=1e-7)
    assert (got <= 180.0 + 1e-9).all()


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(0.1, 10), min_size=1, max_size=40), st.lists(st.floats(0.1, 10), min_size=1, max_size=40))
def test_scale_distance_is_octaves_to_the_nearest_training_scale(train, query):
    # reference: brute force |log2(q / t)| minimised over t; one octave = a factor of two (from memory)
    t, q = np.array(train), np.array(query)
    ref = np.abs(np.log2(q[:, None] / t[None, :])).min(1)
    assert S.nearest_distance(t, q, "octaves") == pytest.approx(ref, abs=1e-9)
    assert S.nearest_distance(np.array([1.0]), np.array([4.0, 0.5]), "octaves") == pytest.approx([2.0, 1.0])


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.floats(-40, 40), st.floats(-40, 40)), min_size=1, max_size=30),
       st.lists(st.tuples(st.floats(-40, 40), st.floats(-40, 40)), min_size=1, max_size=30))
def test_visual_angle_distance_is_the_angle_between_lines_of_sight(train, query):
    # Reference (from memory): a screen point at visual angles (x, y) = (atan(dx/D), atan(dy/D))
    # lies along (tan x, tan y, 1); the angle between two lines of sight is acos(u.v / |u||v|),
    # computed here with the standard library's math module, pair by pair.
    import math

    def sight(p):
        return (math.tan(math.radians(p[0])), math.tan(math.radians(p[1])), 1.0)

    def angle(a, b):
        u, v = sight(a), sight(b)
        dot = sum(i * j for i, j in zip(u, v))
        cos = dot / (math.sqrt(sum(i * i for i in u)) * math.sqrt(sum(j * j for j in v)))
        return math.degrees(math.acos(max(-1.0, min(1.0, cos))))

    ref = [min(angle(q, t) for t in train) for q in query]
    got = S.nearest_distance(np.array(train), np.array(query), "visual_angle")
    assert got == pytest.approx(ref, abs=1e-5)


def test_visual_angle_along_the_horizontal_meridian_is_the_difference_of_angles():
    # Two points on the horizontal meridian and the eye lie in one plane, so the angle between
    # them is exactly the difference of their horizontal visual angles (from the definition).
    got = S.nearest_distance(np.array([[-12.0, 0.0]]), np.array([[3.0, 0.0], [30.0, 0.0]]), "visual_angle")
    assert got == pytest.approx([15.0, 42.0], abs=1e-9)


def test_position_distance_equals_brute_force():
    # reference: scipy.spatial.distance.cdist, minimised over training centres
    rng = np.random.default_rng(5)
    t, q = rng.uniform(0, 64, (300, 2)), rng.uniform(0, 64, (200, 2))
    assert S.nearest_distance(t, q, "euclidean") == pytest.approx(cdist(q, t).min(1))


# ---------------------------------------------------------------- scoring


def test_score_counts_and_intervals_match_a_hand_count():
    rng = np.random.default_rng(0)
    m = make_manifest(rng)
    correct = np.where(m["split"] == "train", rng.random(len(m)) < 0.9, rng.random(len(m)) < 0.4)
    r = S.score(m, predictions_with(m, correct))
    for split in ("train", "test_far"):
        sel = (m["split"] == split).to_numpy()
        row = r.by_split.set_index("split").loc[split]
        k, n = int(correct[sel].sum()), int(sel.sum())
        assert (row["k"], row["n"]) == (k, n)
        ref = stats.binomtest(k, n).proportion_ci(method="wilson")  # Wilson (1927) via scipy
        assert (row["ci_lo"], row["ci_hi"]) == pytest.approx((ref.low, ref.high))
        assert row["chance"] == pytest.approx(0.25)  # four balanced classes
    assert list(r.by_split["split"]) == ["train", "test_far"]
    g = r.gaps.iloc[0]
    assert g["gap"] == pytest.approx(correct[m["split"] == "train"].mean() - correct[m["split"] == "test_far"].mean())
    assert g["gap_lo"] < g["gap"] < g["gap_hi"]
    # every held-out image lands in exactly one distance bin per axis
    for axis, t in r.distance.groupby("axis"):
        assert t["n"].sum() == (m["split"] == "test_far").sum()
        assert t["k"].sum() == correct[m["split"] == "test_far"].sum()
    pos = r.distance[r.distance["axis"] == "position_px"]
    assert pos["held_out_along"].all() and pos["lo"].min() >= 40 - 28 - 1e-9
    assert not r.distance.loc[r.distance["axis"] == "angle_deg", "held_out_along"].any()
    assert r.by_class["n"].sum() == len(m) and r.by_cell["n"].sum() == len(m)
    # the training range on the position axis is the lane the training images used
    (lo, hi), = r.train_ranges["cx_px"]["intervals"]
    assert 4 <= lo < 6 and 26 < hi <= 28


def test_visual_angle_curve_appears_with_viewing_geometry():
    rng = np.random.default_rng(7)
    m = make_manifest(rng)
    D = 600.0  # px from the eye to the screen
    m["x_deg"] = np.degrees(np.arctan((m["cx_px"] - 32) / D))
    m["y_deg"] = np.degrees(np.arctan((m["cy_px"] - 32) / D))
    r = S.score(m, predictions_with(m, np.ones(len(m), bool)))
    deg = r.distance[r.distance["axis"] == "position_deg"]
    px = r.distance[r.distance["axis"] == "position_px"]
    assert deg["held_out_along"].all() and len(deg) == len(px)
    # near the line of sight 1 px subtends about atan(1 / D) degrees (small-angle, from memory)
    ratio = deg["mean_distance"].to_numpy() / px["mean_distance"].to_numpy()
    assert ratio == pytest.approx(np.degrees(np.arctan(1 / D)), rel=0.02)


def test_topk_uses_scores_and_counts_ties_against_the_truth():
    rng = np.random.default_rng(1)
    m = make_manifest(rng, 40, 40)
    truth = m["class_index"].to_numpy()
    s = np.zeros((len(m), 4))
    s[np.arange(len(m)), (truth + 1) % 4] = 0.6
    s[np.arange(len(m)), truth] = 0.3  # second best everywhere: top-1 wrong, top-2 right
    s[:, :] += np.where(s == 0, 0.05, 0.0)
    pred = pd.DataFrame({"image_id": m["image_id"], **{f"prob_{c}": s[:, i] for i, c in enumerate(CLASSES)}})
    pred.attrs.update(score_columns=tuple(f"prob_{c}" for c in CLASSES))
    r = S.score(m, pred, topk=(2, 3))
    assert (r.by_split["accuracy"] == 0).all() and (r.by_split["top2"] == 1).all()
    # a constant scorer ties every class: no credit at any k < number of classes
    flat = pd.DataFrame({"image_id": m["image_id"], **{f"score_{c}": np.ones(len(m)) for c in CLASSES}})
    r = S.score(m, flat, topk=(2, 3))
    assert (r.by_split["top3"] == 0).all()


def test_numeric_predictions_are_class_indices(tmp_path):
    rng = np.random.default_rng(2)
    m = make_manifest(rng, 20, 20)
    p = tmp_path / "p.csv"
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_index"]}).to_csv(p, index=False)
    r = S.score(m, S.load_predictions(p))
    assert (r.by_split["accuracy"] == 1).all()


def test_run_score_writes_every_report_and_reproduces_its_numbers(tmp_path, capsys):
    rng = np.random.default_rng(3)
    m = make_manifest(rng)
    ds = write_manifest(tmp_path, m)
    correct = np.where(m["split"] == "train", True, rng.random(len(m)) < 0.5)
    pa, pb = tmp_path / "model_a.csv", tmp_path / "model_b.parquet"
    predictions_with(m, correct).to_csv(pa, index=False)
    predictions_with(m, np.ones(len(m), bool)).to_parquet(pb, index=False)
    r = S.run_score(ds, pa, tmp_path / "out", compare=pb)
    out = tmp_path / "out"
    doc = json.loads((out / "score.json").read_text())
    assert set(doc["models"]) == {"model_a", "model_b"}
    got = {d["split"]: d["accuracy"] for d in doc["models"]["model_a"]["by_split"]}
    assert got["test_far"] == pytest.approx(correct[m["split"] == "test_far"].mean())
    assert r.by_split.set_index("split").loc["test_far", "accuracy"] == pytest.approx(got["test_far"])
    for stem in ("by_split", "by_class", "by_cell", "distance", "by_value", "gaps", "per_image"):
        assert (out / f"model_a_{stem}.csv").is_file() and (out / f"model_b_{stem}.csv").is_file()
    cmp = pd.read_csv(out / "comparison.csv").set_index("split")
    assert cmp.loc["test_far", "accuracy_model_b"] == 1.0
    page = (out / "report.html").read_text()
    assert page.count("data:image/png;base64,") == 3 and "model_b" in page
    text = capsys.readouterr().out
    assert "test_far" in text and "side by side" in text
    # a single file writes unprefixed tables
    S.run_score(ds, pa, tmp_path / "one", echo=False)
    assert (tmp_path / "one" / "distance.csv").is_file()
    assert json.loads((tmp_path / "one" / "score.json").read_text())["gaps"][0]["split"] == "test_far"


def test_partial_predictions_report_coverage(tmp_path):
    rng = np.random.default_rng(4)
    m = make_manifest(rng, 50, 50)
    p = predictions_with(m, np.ones(len(m), bool)).iloc[10:]
    p.attrs["where"] = "p.csv"
    with pytest.raises(S.DatasetError, match=r"cover 90 of 100 images \(90.0%\); 10 missing \(e.g. train-0000000"):
        S.score(m, p)
    r = S.score(m, p, allow_partial=True)
    assert r.coverage == pytest.approx(0.9)
    assert r.by_split.set_index("split").loc["train", "coverage"] == pytest.approx(0.8)
    assert any("cover 90 of 100" in n for n in r.notes)


# ---------------------------------------------------------------- bad input: one line, names the file


def _bad(tmp_path, text, name="p.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.fixture
def manifest():
    return make_manifest(np.random.default_rng(9), 8, 8)


def _one_line(err):
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(str(err.value.where))
    return msg


def test_empty_file_is_refused(tmp_path):
    with pytest.raises(S.DatasetError) as e:
        S.load_predictions(_bad(tmp_path, ""))
    assert "empty" in _one_line(e)
    with pytest.raises(S.DatasetError, match="no rows"):
        S.load_predictions(_bad(tmp_path, "image_id,predicted\n", "h.csv"))


def test_missing_file_and_unknown_type(tmp_path):
    with pytest.raises(S.DatasetError, match="no such"):
        S.load_predictions(tmp_path / "nope.csv")
    with pytest.raises(S.DatasetError, match="unknown file type .json"):
        S.load_predictions(_bad(tmp_path, "{}", "p.json"))
    with pytest.raises(S.DatasetError, match="no 'image_id' column"):
        S.load_predictions(_bad(tmp_path, "id,predicted\na,b\n"))
    with pytest.raises(S.DatasetError, match="needs a 'predicted' column"):
        S.load_predictions(_bad(tmp_path, "image_id,label\na,b\n"))


def test_duplicate_ids_are_refused(tmp_path):
    with pytest.raises(S.DatasetError) as e:
        S.load_predictions(_bad(tmp_path, "image_id,predicted\na,bar\nb,bar\na,sq\n"))
    assert "1 image id(s) appear more than once (e.g. a)" in _one_line(e)


def test_ids_not_in_the_manifest_are_counted_and_listed(tmp_path, manifest):
    ids = list(manifest["image_id"]) + [f"ghost-{i}" for i in range(7)]
    p = tmp_path / "p.csv"
    pd.DataFrame({"image_id": ids, "predicted": "bar"}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError) as e:
        S.score(manifest, S.load_predictions(p))
    msg = _one_line(e)
    assert "7 prediction id(s) are not in the manifest (e.g. ghost-0, ghost-1, ghost-2, ghost-3, ghost-4, ... 2 more)" in msg


def test_missing_ids_are_refused_without_allow_partial(tmp_path, manifest):
    p = tmp_path / "p.csv"
    pd.DataFrame({"image_id": manifest["image_id"][:-3], "predicted": "bar"}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError) as e:
        S.score(manifest, S.load_predictions(p))
    assert "cover 13 of 16 images" in _one_line(e) and "allow_partial" in str(e.value)


def test_unknown_class_names_are_refused(tmp_path, manifest):
    p = tmp_path / "p.csv"
    pd.DataFrame({"image_id": manifest["image_id"], "predicted": ["bar", "zig", "zag", "sq"] * 4}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError) as e:
        S.score(manifest, S.load_predictions(p))
    assert "2 class(es) the dataset does not have (zig, zag; it has bar, ell, sq, tee)" in _one_line(e)
    pd.DataFrame({"image_id": manifest["image_id"], "predicted": [0, 1, 2, 9] * 4}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError, match=r"class indices the dataset does not have \(9;"):
        S.score(manifest, S.load_predictions(p))
    pd.DataFrame({"image_id": manifest["image_id"], "predicted_index": [0, 1, 2, 7] * 4}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError, match=r"class indices the dataset does not have \(7;"):
        S.score(manifest, S.load_predictions(p))
    cols = {f"score_{c}": 0.0 for c in ("bar", "ell", "sq", "hex")}
    pd.DataFrame({"image_id": manifest["image_id"], **cols}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError, match=r"score_<class> column\(s\) name 1 class\(es\) .* \(hex;"):
        S.score(manifest, S.load_predictions(p))


def test_scores_must_cover_every_class(tmp_path, manifest):
    p = tmp_path / "p.csv"
    pd.DataFrame({"image_id": manifest["image_id"], "score_bar": 1.0, "score_ell": 0.0}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError, match=r"scores given for 2 of 4 classes; no score_<class> column for sq, tee"):
        S.score(manifest, S.load_predictions(p))


def test_probabilities_must_sum_to_one(tmp_path, manifest):
    p = tmp_path / "p.csv"
    probs = {f"prob_{c}": 0.25 for c in CLASSES}
    df = pd.DataFrame({"image_id": manifest["image_id"], **probs})
    df.loc[3, "prob_bar"] = 0.45
    df.to_csv(p, index=False)
    with pytest.raises(S.DatasetError) as e:
        S.load_predictions(p)
    assert "1 row(s) of probabilities do not sum to one (row 4 sums to 1.2" in _one_line(e)
    # score_ columns are free scores, unless the caller claims they are probabilities
    df.columns = [c.replace("prob_", "score_") for c in df.columns]
    df.to_csv(p, index=False)
    assert S.load_predictions(p).attrs["probabilities"] is False
    with pytest.raises(S.DatasetError, match="do not sum to one"):
        S.load_predictions(p, probabilities=True)


def test_non_numeric_scores_and_blank_classes_are_refused(tmp_path):
    with pytest.raises(S.DatasetError, match="score column score_b is not a finite number at row 2"):
        S.load_predictions(_bad(tmp_path, "image_id,score_a,score_b\nx,1,2\ny,1,oops\n"))
    with pytest.raises(S.DatasetError, match="1 row\\(s\\) have no predicted \\(first at row 2\\)"):
        S.load_predictions(_bad(tmp_path, "image_id,predicted\nx,bar\ny,\n"))


def test_ambiguous_digit_class_names_are_refused(tmp_path):
    # a glyph dataset whose classes are the digits, numbered in another order
    m = make_manifest(np.random.default_rng(0), 4, 4)
    m["class_name"] = m["class_index"].map({0: "3", 1: "2", 2: "1", 3: "0"})
    p = tmp_path / "p.csv"
    pd.DataFrame({"image_id": m["image_id"], "predicted": m["class_name"]}).to_csv(p, index=False)
    with pytest.raises(S.DatasetError, match="both class names and other classes' indices"):
        S.score(m, S.load_predictions(p))
    pd.DataFrame({"image_id": m["image_id"], "predicted_class": m["class_name"]}).to_csv(p, index=False)
    assert (S.score(m, S.load_predictions(p)).by_split["accuracy"] == 1).all()


def test_unknown_training_split_and_missing_manifest(tmp_path, manifest):
    p = predictions_with(manifest, np.ones(len(manifest), bool))
    with pytest.raises(S.DatasetError, match=r"training split 'lane_a' is not in the dataset \(splits: train, test_far\)"):
        S.score(manifest, p, train_split="lane_a")
    with pytest.raises(S.DatasetError, match="not an augsplit dataset"):
        S.read_manifest(tmp_path)


def test_predicted_index_must_be_whole_numbers(tmp_path):
    with pytest.raises(S.DatasetError, match=r"predicted_index must hold whole numbers \(first bad at row 2\)"):
        S.load_predictions(_bad(tmp_path, "image_id,predicted_index\na,1\nb,1.5\n"))
