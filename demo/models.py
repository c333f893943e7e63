"""Two small numpy-only classifiers for demos and tests of invariance scoring.

`fit_pixels`: a linear softmax read-out on raw pixels. `fit_pooled`: the same read-out on
features from a fixed bank of oriented filters, rectified and max-pooled over growing
neighbourhoods up to the whole image. Both are deterministic: zero initial weights, full-batch
gradient descent, no random draws.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

# ---------------------------------------------------------------- the linear softmax read-out


@dataclass(frozen=True)
class Softmax:
    """Multinomial logistic regression: logits = X @ W + b over `classes`."""

    W: np.ndarray  # (n_features, n_classes)
    b: np.ndarray  # (n_classes,)
    classes: np.ndarray  # class label per column
    l2: float
    n_iter: int
    loss: float  # final training objective (mean cross-entropy + l2/2 |W|^2)

    def logits(self, X: np.ndarray) -> np.ndarray:
        return np.asarray(X, dtype=np.float32) @ self.W + self.b

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        return softmax(self.logits(X))

    def predict(self, X: np.ndarray) -> np.ndarray:
        return self.classes[np.argmax(self.logits(X), axis=1)]


def softmax(z: np.ndarray) -> np.ndarray:
    z = z - z.max(axis=1, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=1, keepdims=True)


def fit_softmax(X: np.ndarray, y: np.ndarray, *, classes=None, l2: float = 1e-3, n_iter: int = 300,
                method: str = "auto") -> Softmax:
    """Full-batch gradient descent with Nesterov momentum from W = 0, b = 0.

    Objective: mean cross-entropy + (l2 / 2) |W|^2 (the bias is not penalised). Every update is
    a linear combination of past gradients X^T G, so a feature that is zero on every training
    row has gradient l2 * W = 0 at W = 0 and its weights stay exactly zero. The same fact keeps
    W = X^T A in the row space of X; when there are fewer rows than features the iterations run
    on A with the Gram matrix X X^T, which gives the same iterates at a fraction of the cost.
    """
    X = np.ascontiguousarray(X, dtype=np.float32)
    y = np.asarray(y)
    classes = np.unique(y) if classes is None else np.asarray(classes)
    col = np.searchsorted(classes, y)
    if X.ndim != 2 or len(X) != len(y) or len(y) == 0:
        raise ValueError(f"X must be (n, d) with n = len(y) > 0; got {X.shape} and {len(y)} labels")
    if not np.array_equal(classes[np.clip(col, 0, len(classes) - 1)], y):
        raise ValueError("labels outside the given classes")
    n, d = X.shape
    Y = np.zeros((n, len(classes)), dtype=np.float32)
    Y[np.arange(n), col] = 1.0
    if method not in ("auto", "primal", "dual"):
        raise ValueError(f"method must be auto, primal or dual, not {method!r}")
    if method == "dual" or (method == "auto" and n < d):
        K = X @ X.T
        W, b = _descend(lambda A: K @ A, lambda G: G, Y, n, l2, n_iter, _top_eig(K) + n)
        W = X.T @ W  # A -> W = X^T A: exactly zero on features no training row has
    else:
        W, b = _descend(lambda W: X @ W, lambda G: X.T @ G, Y, d, l2, n_iter, _top_eig(X.T @ X) + n)
    P = softmax(X @ W + b)
    loss = float(-np.log(np.maximum(P[np.arange(n), col], 1e-30)).mean() + 0.5 * l2 * np.sum(W.astype(np.float64) ** 2))
    W.setflags(write=False)
    b.setflags(write=False)
    return Softmax(W=W, b=b, classes=classes, l2=l2, n_iter=n_iter, loss=loss)


def _descend(forward, backward, Y, dim, l2, n_iter, sigma2):
    """Nesterov-accelerated gradient descent on (weights, bias).

    `forward(M)` gives the logits without bias, `backward(G)` the weight gradient of the loss
    (primal: M = W, forward = X W, backward = X^T G; dual: M = A with W = X^T A, forward = K A,
    backward = G, since X^T (G + l2 A) is then the primal gradient). The step is 1/L with
    L = |[X 1]|_2^2 / (2n) + l2: the softmax cross-entropy's Hessian in the logits is at most
    1/2 in spectral norm (from memory), and sigma2 bounds |[X 1]|_2^2 by |X|_2^2 + n.
    """
    n, C = Y.shape
    step = np.float32(1.0 / (0.5 * sigma2 / n + l2))
    M = np.zeros((dim, C), dtype=np.float32)
    b = np.zeros(C, dtype=np.float32)
    M_prev, b_prev = M, b
    for t in range(1, n_iter + 1):
        mom = np.float32((t - 1) / (t + 2))
        Ml = M + mom * (M - M_prev)
        bl = b + mom * (b - b_prev)
        G = (softmax(forward(Ml) + bl) - Y) / np.float32(n)  # d loss / d logits
        M_prev, b_prev = M, b
        M = Ml - step * (backward(G) + np.float32(l2) * Ml)
        b = bl - step * G.sum(axis=0)
    return M, b


def _top_eig(S: np.ndarray) -> float:
    """Largest eigenvalue of a symmetric positive semi-definite matrix, padded by 10% because
    deterministic power iteration approaches it from below."""
    v = np.ones(S.shape[0], dtype=S.dtype)
    lam = 0.0
    for _ in range(100):
        w = S @ v
        lam = float(np.linalg.norm(w))
        if lam == 0:
            break
        v = w / lam
    return 1.1 * lam


# ---------------------------------------------------------------- model on raw pixels


def raw_pixels(images: np.ndarray) -> np.ndarray:
    """(n, H, W[, C]) uint8 -> (n, H*W*C) float32 in [0, 1]; no centring, so black stays zero."""
    images = np.asarray(images)
    return images.reshape(len(images), -1).astype(np.float32) / 255.0


@dataclass(frozen=True)
class PixelModel:
    readout: Softmax

    def predict_proba(self, images: np.ndarray) -> np.ndarray:
        return self.readout.predict_proba(raw_pixels(images))

    def predict(self, images: np.ndarray) -> np.ndarray:
        return self.readout.predict(raw_pixels(images))


def fit_pixels(images: np.ndarray, y: np.ndarray, *, classes=None, l2: float = 1e-3, n_iter: int = 300) -> PixelModel:
    return PixelModel(fit_softmax(raw_pixels(images), y, classes=classes, l2=l2, n_iter=n_iter))


# ---------------------------------------------------------------- model on pooled filter responses


@dataclass(frozen=True)
class FilterBank:
    kernels: tuple[np.ndarray, ...]
    names: tuple[str, ...]


def gabor_bank(wavelengths=(4.0, 8.0), n_orientations: int = 4, aspect: float = 0.5) -> FilterBank:
    """Even and odd Gabor kernels at each wavelength and orientation, zero mean, unit L1 norm.

    Zero mean makes a uniform patch (background) give no response at all.
    """
    kernels, names = [], []
    for lam in wavelengths:
        sigma = 0.5 * lam
        size = int(2 * np.ceil(2.5 * sigma) + 1)
        for i in range(n_orientations):
            theta = np.pi * i / n_orientations
            for phase, psi in (("even", 0.0), ("odd", np.pi / 2)):
                k = cv2.getGaborKernel((size, size), sigma, theta, lam, aspect, psi, ktype=cv2.CV_32F)
                k = k - k.mean()
                k = k / np.abs(k).sum()
                kernels.append(k.astype(np.float32))
                names.append(f"gabor_l{lam:g}_o{np.degrees(theta):.0f}_{phase}")
    return FilterBank(tuple(kernels), tuple(names))


def luminance(images: np.ndarray) -> np.ndarray:
    """Grey level as the HSV value (max over channels), so a hue rotation leaves it unchanged."""
    images = np.asarray(images)
    g = images.max(axis=-1) if images.ndim == 4 else images
    return g.astype(np.float32) / 255.0


def filter_maps(grey: np.ndarray, bank: FilterBank) -> np.ndarray:
    """(n, H, W) -> (n, 2K, H, W): each kernel's response split into its two rectified halves.

    Edges are replicated, as cv2.BORDER_REPLICATE would per image; the images are filtered as
    one tall stack (one OpenCV call per kernel) with an edge-replicated margin around each.
    """
    n, H, W = grey.shape
    out = np.empty((n, 2 * len(bank.kernels), H, W), dtype=np.float32)
    for j, r in enumerate(_responses(grey, bank)):
        np.maximum(r, 0, out=out[:, 2 * j])
        np.maximum(-r, 0, out=out[:, 2 * j + 1])
    return out


def _responses(grey: np.ndarray, bank: FilterBank):
    """Yield each kernel's (n, H, W) response to every image."""
    n, H, W = grey.shape
    reach = max(max(k.shape) for k in bank.kernels) // 2
    stack = np.pad(grey, ((0, 0), (reach, reach), (reach, reach)), mode="edge")
    tall = stack.reshape(n * (H + 2 * reach), W + 2 * reach)
    for k in bank.kernels:
        r = cv2.filter2D(tall, cv2.CV_32F, k, borderType=cv2.BORDER_REPLICATE)
        yield r.reshape(n, H + 2 * reach, W + 2 * reach)[:, reach:reach + H, reach:reach + W]


def pool_growing(maps: np.ndarray, sizes=(4, 8, 16)) -> np.ndarray:
    """Max over neighbourhoods of growing size, each summarised without position.

    For each size s in `sizes` every map is max-pooled over s x s neighbourhoods (dense,
    stride 1) and the pooled map is summed over the image, without clipping at its edges, and
    divided by the image area; the last level is the max over the whole image. `maps` are
    rectified (non-negative) responses (n, m, H, W); output (n, m * (len(sizes) + 1)), level
    by level. Wherever an object sits, each feature is the same, as long as its responses lie
    inside the image.
    """
    n, m, H, W = maps.shape
    levels = [_pool_map(maps[:, j], sizes) for j in range(m)]  # each (n, len(sizes) + 1)
    return np.stack(levels, axis=1).transpose(0, 2, 1).reshape(n, -1)


def _pool_map(rect: np.ndarray, sizes) -> np.ndarray:
    """One rectified map (n, H, W) -> (n, len(sizes) + 1) pooled features.

    The images are laid out side by side as tiles of one wide zero canvas, each with a zero
    margin of P = max(size) - 1 above and to the left. The window is anchored at its top-left
    corner, so a response spreads at most P pixels up and left, into its own tile's margin and
    never onto another tile's content: one cv2.dilate per size pools every image at once, and
    no window is cut off by the image edge.
    """
    n, H, W = rect.shape
    if any(int(s) < 1 for s in sizes):
        raise ValueError(f"neighbourhood sizes must be positive, got {tuple(sizes)}")
    P = max([int(s) for s in sizes], default=1) - 1
    tiles = np.zeros((H + P, n, W + P), dtype=np.float32)
    tiles[P:, :, P:] = rect.transpose(1, 0, 2)
    wide = tiles.reshape(H + P, n * (W + P))
    out = np.empty((n, len(sizes) + 1), dtype=np.float32)
    for i, s in enumerate(sizes):
        s = int(s)
        pooled = cv2.dilate(wide, np.ones((s, s), np.uint8), anchor=(0, 0),
                            borderType=cv2.BORDER_CONSTANT, borderValue=0)
        out[:, i] = pooled.reshape(H + P, n, W + P).sum(axis=(0, 2), dtype=np.float64) / (H * W)
    out[:, -1] = rect.reshape(n, -1).max(axis=1)
    return out


def pooled_features(images: np.ndarray, bank: FilterBank, sizes=(4, 8, 16), batch: int = 512) -> np.ndarray:
    """Images -> (n, 2K * (len(sizes) + 1)) features: filter, rectify, pool (see pool_growing)."""
    images = np.asarray(images)
    parts = []
    for i in range(0, len(images), batch):
        grey = luminance(images[i:i + batch])
        feats = []
        for r in _responses(grey, bank):
            feats.append(_pool_map(np.maximum(r, 0), sizes))
            feats.append(_pool_map(np.maximum(-r, 0), sizes))
        parts.append(np.stack(feats, axis=1).transpose(0, 2, 1).reshape(len(grey), -1))
    return np.concatenate(parts, axis=0)


@dataclass(frozen=True)
class PooledModel:
    bank: FilterBank
    sizes: tuple[int, ...]
    scale: np.ndarray
    readout: Softmax

    def features(self, images: np.ndarray) -> np.ndarray:
        return pooled_features(images, self.bank, self.sizes)

    def predict_proba(self, images: np.ndarray | None = None, *, features: np.ndarray | None = None) -> np.ndarray:
        """Class probabilities from images, or from their `features()` computed once before."""
        F = self.features(images) if features is None else features
        return self.readout.predict_proba(F / self.scale)

    def predict(self, images: np.ndarray | None = None, *, features: np.ndarray | None = None) -> np.ndarray:
        F = self.features(images) if features is None else features
        return self.readout.predict(F / self.scale)


def fit_pooled(images: np.ndarray | None, y: np.ndarray, *, classes=None, bank: FilterBank | None = None,
               sizes=(4, 8, 16), l2: float = 1e-3, n_iter: int = 300, features: np.ndarray | None = None) -> PooledModel:
    """Fixed filters -> rectify -> max over growing neighbourhoods -> linear softmax read-out.

    No pooled feature carries the position of what it pooled, so the read-out cannot tie a
    class to where training showed it. (A read-out of the local pooling cells themselves
    would: cells that training never reached get exactly zero weight, as raw pixels do.)
    `features` may hold `pooled_features(images, bank, sizes)` already computed.
    """
    bank = bank or gabor_bank()
    F = pooled_features(images, bank, sizes) if features is None else np.asarray(features, dtype=np.float32)
    # Scale without centring, as raw pixels are: a feature that is zero on every training
    # image keeps the value 0 there, so the read-out sees the same kind of input as on pixels.
    rms = np.sqrt((F.astype(np.float64) ** 2).mean(axis=0))
    scale = np.where(rms > 1e-6, rms, 1.0).astype(np.float32)
    readout = fit_softmax(F / scale, y, classes=classes, l2=l2, n_iter=n_iter)
    return PooledModel(bank, tuple(sizes), scale, readout)
