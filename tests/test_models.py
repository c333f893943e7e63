"""The demo classifiers: the read-out's optimisation, the pooled features' invariance, and the
no-overlap property of a linear model on raw pixels, on a dataset made by `augsplit generate`."""

from __future__ import annotations

import sys
import textwrap
from pathlib import Path

import cv2
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize

from augsplit import score as S

# the demo's classifiers live beside the demo (demo/models.py), not in the package
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "demo"))
import models as M  # noqa: E402


def toy_problem(seed=0, n=60, d=5, C=3):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, d)).astype(np.float32)
    y = (X[:, 0] + 0.5 * X[:, 1] + rng.normal(scale=0.7, size=n) > 0).astype(int) + (X[:, 2] > 0.8)
    return X, y % C


def objective(theta, X, Y, l2):
    """Mean cross-entropy + l2/2 |W|^2 and its gradient, written out independently of models.py."""
    d, C = X.shape[1], Y.shape[1]
    W, b = theta[: d * C].reshape(d, C), theta[d * C:]
    Z = X @ W + b
    Z = Z - Z.max(1, keepdims=True)
    logp = Z - np.log(np.exp(Z).sum(1, keepdims=True))
    P = np.exp(logp)
    f = -(Y * logp).sum(1).mean() + 0.5 * l2 * (W ** 2).sum()
    G = (P - Y) / len(X)
    return f, np.concatenate([(X.T @ G + l2 * W).ravel(), G.sum(0)])


def test_gradient_descent_reaches_the_optimum_scipy_finds():
    # Reference: scipy.optimize.minimize (L-BFGS-B) on the same convex objective.
    X, y = toy_problem()
    Y = np.eye(3)[y]
    l2 = 1e-2
    ref = optimize.minimize(objective, np.zeros(X.shape[1] * 3 + 3), args=(X.astype(float), Y, l2),
                            jac=True, method="L-BFGS-B", options={"gtol": 1e-10, "maxiter": 10_000})
    fit = M.fit_softmax(X, y, l2=l2, n_iter=3000)
    assert fit.loss == pytest.approx(ref.fun, abs=1e-5)
    assert fit.loss >= ref.fun - 1e-6  # gradient descent cannot beat the optimum


def test_primal_and_dual_iterations_agree():
    # W = X^T A (common practice, no source: the representer form of an L2-penalised linear model)
    rng = np.random.default_rng(1)
    X = rng.random((40, 120)).astype(np.float32)
    y = rng.integers(0, 4, 40)
    a = M.fit_softmax(X, y, method="primal", n_iter=200)
    b = M.fit_softmax(X, y, method="dual", n_iter=200)
    assert np.allclose(a.W, b.W, atol=1e-4) and np.allclose(a.b, b.b, atol=1e-4)
    assert a.loss == pytest.approx(b.loss, rel=1e-4)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), method=st.sampled_from(["primal", "dual"]), l2=st.sampled_from([0.0, 1e-3, 1e-1]))
def test_features_absent_from_training_keep_exactly_zero_weights(seed, method, l2):
    # From the gradient of the loss: dL/dW_j = X[:, j]^T G + l2 W_j is exactly 0 when column j is
    # all zeros and W_j = 0, so no update ever moves W_j.
    rng = np.random.default_rng(seed)
    X = rng.random((30, 50)).astype(np.float32)
    dead = rng.random(50) < 0.3
    X[:, dead] = 0.0
    y = rng.integers(0, 3, 30)
    fit = M.fit_softmax(X, y, l2=l2, method=method, n_iter=50)
    assert np.all(fit.W[dead] == 0.0)
    assert np.any(fit.W[~dead] != 0.0)


def test_fits_are_deterministic():
    X, y = toy_problem(2)
    a, b = M.fit_softmax(X, y), M.fit_softmax(X, y)
    assert np.array_equal(a.W, b.W) and np.array_equal(a.b, b.b)


def test_filter_maps_equal_opencv_per_image():
    # Reference: cv2.filter2D on each image with BORDER_REPLICATE.
    rng = np.random.default_rng(3)
    grey = rng.random((5, 32, 40)).astype(np.float32)
    bank = M.gabor_bank()
    maps = M.filter_maps(grey, bank)
    for i in range(len(grey)):
        for j, k in enumerate(bank.kernels):
            r = cv2.filter2D(grey[i], cv2.CV_32F, k, borderType=cv2.BORDER_REPLICATE)
            assert np.allclose(maps[i, 2 * j], np.maximum(r, 0), atol=1e-6)
            assert np.allclose(maps[i, 2 * j + 1], np.maximum(-r, 0), atol=1e-6)


def test_pooling_equals_brute_force_windows():
    # Reference: a plain loop over every s x s window that overlaps the image (the full dilation).
    rng = np.random.default_rng(4)
    rect = np.maximum(rng.normal(size=(3, 9, 11)), 0).astype(np.float32)
    sizes = (2, 3, 5)
    got = M._pool_map(rect, sizes)
    n, H, W = rect.shape
    for i in range(n):
        for j, s in enumerate(sizes):
            total = sum(rect[i, max(0, y):y + s, max(0, x):x + s].max()
                        for y in range(-(s - 1), H) for x in range(-(s - 1), W))
            assert got[i, j] == pytest.approx(total / (H * W), rel=1e-5)
        assert got[i, -1] == rect[i].max()


def tile_image(cx, cy, size=48):
    img = np.zeros((size, size), np.uint8)
    cells = [(0, 0), (0, 1), (0, 2), (1, 1)]  # a T of four 3-px cells
    for r, c in cells:
        cv2.rectangle(img, (cx + 3 * c, cy + 3 * r), (cx + 3 * c + 2, cy + 3 * r + 2), 255, -1)
    return img


@settings(max_examples=20, deadline=None)
@given(dx=st.integers(-8, 8), dy=st.integers(-8, 8))
def test_pooled_features_do_not_depend_on_position(dx, dy):
    # Max over a neighbourhood and sums over the whole image commute with translation (from
    # the definitions), as long as the responses stay inside the image: the widest kernel
    # reaches 10 px, and the tile stays at least 11 px from every edge here.
    bank = M.gabor_bank()
    a = M.pooled_features(tile_image(20, 20)[None], bank)
    b = M.pooled_features(tile_image(20 + dx, 20 + dy)[None], bank)
    assert np.allclose(a, b, rtol=1e-5, atol=1e-7)


def test_a_blank_image_has_no_features():
    # zero-mean kernels (common practice, no source): a uniform patch gives no response
    F = M.pooled_features(np.full((2, 32, 32), 90, np.uint8), M.gabor_bank())
    assert np.abs(F).max() < 1e-5


# ---------------------------------------------------------------- the no-overlap property

LANES = textwrap.dedent("""\
    # A camera over a conveyor: training tiles ran in the top lane only, test tiles in the
    # bottom lane, which no training tile reached (footprint-disjoint, proven by the planner).
    seed: 7
    canvas: {width: 48, height: 48, mode: gray}
    objects: {kind: polyomino, cells: 4, cell_px: 3}
    background: {kind: solid, value: 0.0}
    axes:
      x:     {range: [6, 42]}
      y:     {range: [5, 43]}
      angle: {range: [-10, 10]}
    splits:
      train:    {region: {y: [5, 14]}, per_class: 60}
      test_far: {region: {y: [34, 43]}, per_class: 40}
    guarantees:
      - {disjoint: footprint, between: [train, test_far]}
    """)


@pytest.fixture(scope="module")
def lanes(tmp_path_factory):
    from augsplit.generate import Options, generate
    from augsplit.dataset import read_manifest

    root = tmp_path_factory.mktemp("lanes")
    spec = root / "lanes.yaml"
    spec.write_text(LANES)
    generate(spec, root / "ds", Options(progress=False))
    m = read_manifest(root / "ds")
    images = np.stack([cv2.imread(str(root / "ds" / f), cv2.IMREAD_UNCHANGED) for f in m["file"]])
    return m, images


def test_linear_model_on_raw_pixels_cannot_reach_pixels_training_never_covered(lanes):
    m, images = lanes
    train = (m["split"] == "train").to_numpy()
    far = (m["split"] == "test_far").to_numpy()
    y = m["class_index"].to_numpy()
    n_classes = len(np.unique(y))
    seen = images[train].max(axis=0) > 0  # pixels any training tile touched (black background)
    test_only = (images[far].max(axis=0) > 0) & ~seen
    assert not (seen & (images[far].max(axis=0) > 0)).any()  # the split is footprint-disjoint
    assert test_only.sum() > 100

    lin = M.fit_pixels(images[train], y[train], l2=1e-3, n_iter=300)
    # Why the weights are exactly zero: the gradient of mean cross-entropy + l2/2 |W|^2 in the
    # weight of pixel j is X[:, j]^T (P - Y) / n + l2 W_j. Every training image is black (0) at
    # a test-only pixel, and W_j starts at 0, so the gradient there is exactly 0 at every step.
    W = lin.readout.W  # (pixels, classes)
    assert np.all(W[test_only.ravel()] == 0.0)
    assert np.all(W[~seen.ravel()] == 0.0)
    # So a test image, black wherever W is not zero, gets logits equal to the bias alone ...
    logits = lin.readout.logits(M.raw_pixels(images[far]))
    assert np.array_equal(logits, np.broadcast_to(lin.readout.b, logits.shape))
    pred = lin.predict(images[far])
    assert len(np.unique(pred)) == 1
    # ... and its accuracy is that of one constant guess: within the binomial bounds of chance
    # (scipy.stats.binom.interval at p = 1 / classes; the classes are balanced).
    acc = (pred == y[far]).mean()
    lo, hi = S.chance_bounds(int(far.sum()), 1 / n_classes)
    assert lo <= acc <= hi

    # The pooled model's features do not say where the tile was, so what it learnt in the top
    # lane applies in the bottom one: clearly above chance (Wilson (1927) lower bound).
    pooled = M.fit_pooled(images[train], y[train])
    k = int((pooled.predict(images[far]) == y[far]).sum())
    wlo, _ = S.wilson_interval(k, int(far.sum()))
    assert wlo > hi

    # and the scorer says so about the linear model's predictions
    preds = pd.DataFrame({"image_id": m["image_id"], "predicted_index": lin.predict(images)})
    r = S.score(m, preds)
    assert "not distinguishable from chance" in r.verdicts[0]
    far_d = r.distance[(r.distance["axis"] == "position_px") & (r.distance["split"] == "test_far")]
    assert far_d["held_out_along"].all() and far_d["lo"].min() > 15
