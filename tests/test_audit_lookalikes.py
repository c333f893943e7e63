"""Near-duplicates judged against the design: clean datasets from every shipped config, the
built-in demo and random clean specs raise no near-duplicate failure, while a train image
copied, shifted 1 px, re-encoded as JPEG or made a little brighter over a test image fails and
is named with its source. Rates measured here are printed (run with -s) and written in the
README's audit section; tests/bench/bench_lookalikes.py measures them on more leaks."""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from lookalikes import LEAKS, make, named, plant, random_spec

from augsplit.audit import run_audit
from augsplit.audit.entry import audit_dataset
from augsplit.dataset import open_dataset
from augsplit.generate import Options, generate
from augsplit.spec import builtin_spec_path

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = sorted((ROOT / "configs").glob("*.yaml")) + [builtin_spec_path("demo")]
FAST = {"worst_k": 1000, "thumbnails": 0, "category_pairs": 100}  # every offender listed; masks sampled lightly
N_RANDOM = 32


def _near(result):
    return [c for c in result.checks if c.name == "near_duplicates"]


@pytest.mark.slow
@pytest.mark.parametrize("spec", CONFIGS, ids=lambda p: p.stem)
def test_shipped_config_has_no_false_alarm_and_every_planted_leak_is_named(spec, tmp_path):
    out = tmp_path / "data"
    generate(spec, out, Options(progress=False))
    clean = audit_dataset(out, thresholds=FAST)
    assert [c.verdict for c in _near(clean) if c.verdict == "fail"] == [], [c.detail for c in _near(clean)]
    assert all(c.numbers["method"] == "render" for c in _near(clean))
    planted = plant(out, tmp_path / "leaky", list(LEAKS), per_kind=2, seed=1)
    caught = named(audit_dataset(tmp_path / "leaky", thresholds=FAST), planted)
    assert caught == {k: [True, True] for k in LEAKS}, caught


@pytest.mark.slow
def test_random_clean_specs_have_no_false_alarm_and_leaks_are_named(tmp_path):
    false_alarms, audited, caught = 0, 0, {k: 0 for k in LEAKS}
    for seed in range(N_RANDOM):
        out = make(random_spec(seed), tmp_path / f"clean{seed}")
        result = audit_dataset(out, thresholds=FAST)
        audited += 1
        false_alarms += any(c.verdict == "fail" for c in _near(result))
        planted = plant(out, tmp_path / f"leak{seed}", list(LEAKS), seed=seed)
        for kind, hits in named(audit_dataset(tmp_path / f"leak{seed}", thresholds=FAST), planted).items():
            caught[kind] += sum(hits)
    print(f"\nrandom clean specs audited: {audited}; near-duplicate false alarms: {false_alarms}; "
          f"planted leaks named: {caught} of {audited} each")
    assert audited >= 30
    assert false_alarms == 0
    assert caught == {k: audited for k in LEAKS}


@pytest.mark.slow
def test_lossy_store_is_judged_against_its_codec(tmp_path):
    # JPEG stores differ from their renders everywhere: the codec level is measured on training
    # rows, and a look-alike is a copy only when it lies at most half as far from a train image
    # as from its own render.
    spec = random_spec(3)  # a flat background, where look-alikes are many
    out = make(spec, tmp_path / "jpeg", format="jpeg", quality=85)
    clean = audit_dataset(out, thresholds=FAST)
    assert not any(c.verdict == "fail" for c in _near(clean)), [c.detail for c in _near(clean)]
    planted = plant(out, tmp_path / "leaky", list(LEAKS), seed=2)
    caught = named(audit_dataset(tmp_path / "leaky", thresholds=FAST), planted)
    assert caught == {k: [True] for k in LEAKS}, caught


# ---- without a renderer: the pixel null and the hash null ------------------------------------

def _axes(out):
    plan = open_dataset(out).built.plan
    return {n: plan.space[n] for n in plan.space.names if n != "class"}


NOISE = {"seed": 5, "canvas": {"width": 64, "height": 64, "mode": "rgb"},
         "objects": {"kind": "polyomino", "cells": 4, "cell_px": 4},
         "background": {"kind": "pink_noise", "mean": 0.5, "contrast": 0.15},
         "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "angle": {"range": [0, 360]}},
         "splits": {"train": {"region": {"x": [0, 30]}, "per_class": 12},
                    "test": {"region": {"x": [34, 64]}, "per_class": 6}},
         "guarantees": [{"disjoint": "parameters", "between": ["train", "test"]}]}
FLAT = {**NOISE, "background": {"kind": "solid", "value": 0.1}}


@pytest.fixture(scope="module")
def noise_data(tmp_path_factory):
    return make(NOISE, tmp_path_factory.mktemp("noise") / "data")


@pytest.fixture(scope="module")
def flat_data(tmp_path_factory):
    return make(FLAT, tmp_path_factory.mktemp("flat") / "data")


def test_pixel_null_on_noise_backgrounds_passes_clean_and_names_every_leak(noise_data, tmp_path):
    clean = run_audit(noise_data, _axes(noise_data), thresholds=FAST).get("near_duplicates")
    assert clean.numbers["method"] == "pixels" and clean.verdict == "pass"
    # distinct training neighbours differ by about their whole content (normalised residual ~1)
    assert clean.numbers["null"]["p01"] > 0.5
    planted = plant(noise_data, tmp_path / "leaky", list(LEAKS), seed=4)
    caught = named(run_audit(tmp_path / "leaky", _axes(noise_data), thresholds=FAST), planted)
    assert caught == {k: [True] for k in LEAKS}, caught


def test_pixel_null_on_flat_backgrounds_raises_no_false_alarm_and_catches_copies(flat_data, tmp_path):
    nd = run_audit(flat_data, _axes(flat_data), thresholds=FAST).get("near_duplicates")
    assert nd.numbers["method"] == "pixels" and nd.verdict != "fail" and nd.numbers["n_leaks"] == 0, nd.detail
    planted = plant(flat_data, tmp_path / "leaky", ["copy"], per_kind=2, seed=4)
    caught = named(run_audit(tmp_path / "leaky", _axes(flat_data), thresholds=FAST), planted)
    assert caught == {"copy": [True, True]}


def test_hash_null_only_fails_below_what_distinct_training_images_show(noise_data, flat_data):
    from augsplit.audit.phash import phash, uint64_to_hex
    from augsplit.dataset import read_manifest

    for data, expect in ((noise_data, "fail"), (flat_data, None)):
        t = read_manifest(data).drop(columns=["file", "image_bytes", "sha256"])
        imgs = [cv2.cvtColor(cv2.imread(str(data / f)), cv2.COLOR_BGR2RGB) for f in read_manifest(data)["file"]]
        t["phash"] = uint64_to_hex([phash(i) for i in imgs])
        test_row = int(np.flatnonzero(t["split"] == "test")[0])
        t.loc[test_row, "phash"] = t.loc[0, "phash"]  # a test row claims train row 0's hash
        nd = run_audit(t, _axes(data), thresholds=FAST).get("near_duplicates")
        assert nd.numbers["method"] == "hash"
        if expect == "fail":
            assert nd.verdict == "fail" and nd.worst.iloc[0]["train_id"] == t["image_id"][0]
        else:  # distinct flat training images share hashes: the hash alone cannot tell, so it warns
            assert nd.verdict == "warn" and nd.numbers["n_ambiguous"] >= 1 and nd.numbers["null"]["p01"] == 0


def test_fixed_radius_is_still_available(flat_data):
    nd = run_audit(flat_data, _axes(flat_data), thresholds={**FAST, "duplicate_judge": "radius"}).get("near_duplicates")
    assert nd.numbers["method"] == "radius" and nd.numbers["n_leaks"] == nd.numbers["n_near_duplicates"]


# ---- the pixel comparison ------------------------------------------------------------------

def _texture(seed: int, hw=(48, 40)):
    rng = np.random.default_rng(seed)
    return cv2.GaussianBlur(rng.integers(0, 256, (*hw, 3), dtype=np.uint8), (0, 0), 2)


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 10_000), dx=st.integers(-2, 2), dy=st.integers(-2, 2),
       gain=st.floats(0.7, 1.2), offset=st.floats(-15, 15))
def test_residual_ignores_small_shifts_and_brightness_but_not_other_images(seed, dx, dy, gain, offset):
    from augsplit.audit import lookalike

    a = _texture(seed)
    moved = np.roll(a, (dy, dx), axis=(0, 1))
    # the comparison is over the overlap at the best shift: a pure shift leaves nothing
    assert lookalike.residual(a, moved) < 1e-6
    brighter = np.clip(a.astype(np.float64) * gain + offset + 20, 0, 255)
    unclipped = brighter.copy()
    brighter = np.round(brighter).astype(np.uint8)
    if (unclipped > 0).all() and (unclipped < 255).all():
        assert lookalike.residual(a, brighter) <= 0.5  # rounding only
    other = _texture(seed + 1)
    assert lookalike.residual(a, other) > 10 * lookalike.residual(a, brighter) + 1
    assert lookalike.normalised_residual(a, other) > 0.5  # unrelated images: about their whole content


def test_most_similar_finds_the_shifted_source_among_look_alikes():
    from augsplit.audit import lookalike
    from augsplit.audit.phash import phash_batch

    imgs = [_texture(s, (64, 64)) for s in range(40)]
    shifted = np.roll(imgs[17], 1, axis=1)
    _, coef = phash_batch(np.stack(imgs + [shifted]), coefficients=True)
    d = lookalike.ac_directions(coef)
    assert lookalike.most_similar(d[-1:], d[:-1], k=1)[0, 0] == 17
