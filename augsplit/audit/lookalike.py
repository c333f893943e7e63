"""Is a near-duplicate a leak or a look-alike the design makes? Pixel evidence for the
near-duplicate check.

A perceptual hash finds test images that look like train images; on flat backgrounds the
design itself makes many (the same shape in another cell or at another scale). Three judges,
from strongest to weakest evidence:

- render: on a dataset augsplit generated, each row re-renders its image. An image whose
  pixels are its own row's recorded render (content hash equal) is explained by its
  parameters. Otherwise a test image is a copy of a train image when it lies at most half as
  far from that image (best 1-2 px shift and brightness gain) as from its own row's render,
  and closer than the two rows' renders lie to each other.
- pixels: without a renderer, the aligned residual of a pair, in units of the images' own
  contrast, is compared with the same residual between distinct training images and their
  nearest training neighbour by hash (the null the data's renderer and background produce).
- hash: with hashes only, a test image is a leak when it lies closer to a train image than
  99% of training images lie to their nearest other training image.
"""

from __future__ import annotations

from typing import Callable

import cv2
import numpy as np

from .nearest_hash import hamming

WORK_SIDE = 128  # pixel comparisons run at most this many pixels on a side (INTER_AREA)
MAX_SHIFT = 2  # integer shifts tried in each direction at the working size
GAIN = (0.5, 2.0)  # the brightness gains a residual may apply
COPY_RATIO = 0.5  # a copy lies at most this fraction as far from its source as from its own render
# a training image that is not its render is a copy of a test image only when this much closer to
# it than to its own render (common practice, no source; a look-alike of the demo lay at 0.32x)
TRAIN_COPY_RATIO = 0.1
NULL_SAMPLES = 200  # training images whose nearest training neighbour forms the null
NULL_QUANTILE = 0.01
SIMILAR_K = 10  # train images, by DCT block, compared with a changed test image


def working(img: np.ndarray) -> np.ndarray:
    """float32 (H, W, C) at most WORK_SIDE on a side (area-averaged), so large photographs cost
    what a thumbnail costs; a 1 px shift at full size stays a sub-pixel shift here."""
    a = np.asarray(img)
    if a.ndim == 2:
        a = a[..., None]
    h, w = a.shape[:2]
    f = max(h, w) / WORK_SIDE
    if f > 1:
        size = (max(1, round(w / f)), max(1, round(h / f)))
        a = cv2.resize(a, size, interpolation=cv2.INTER_AREA)
        if a.ndim == 2:
            a = a[..., None]
    return a.astype(np.float32)


def spread(img: np.ndarray) -> float:
    """Mean absolute deviation from the per-channel median: how much the image holds beyond
    its background (grey levels)."""
    a = working(img)
    return float(np.abs(a - np.median(a.reshape(-1, a.shape[2]), axis=0)).mean())


def residual(a: np.ndarray, b: np.ndarray, max_shift: int = MAX_SHIFT, gain: bool = True) -> float:
    """Mean absolute difference (grey levels, working size) between b and a, minimised over
    integer shifts of up to `max_shift` px and, with `gain`, over b ~ g a + o (least squares,
    one gain for all channels, held to GAIN). Copies, shifted copies, re-encodes and brightness changes of an
    image lie near 0."""
    A, B = working(a), working(b)
    c = min(A.shape[2], B.shape[2])  # grey against colour: compare the first channel(s) only
    A, B = A[..., :c], B[..., :c]
    if A.shape != B.shape:  # images of different sizes: b at a's size
        B = cv2.resize(B, (A.shape[1], A.shape[0]), interpolation=cv2.INTER_AREA).reshape(A.shape)
    h, w = A.shape[:2]
    best = np.inf
    for dy in range(-max_shift, max_shift + 1):
        for dx in range(-max_shift, max_shift + 1):
            x = A[max(dy, 0): h + min(dy, 0), max(dx, 0): w + min(dx, 0)]
            y = B[max(-dy, 0): h + min(-dy, 0), max(-dx, 0): w + min(-dx, 0)]
            if x.size == 0:
                continue
            if gain:
                xm, ym = float(x.mean()), float(y.mean())
                xc = x - xm
                var = float((xc * xc).sum())
                g = float((xc * (y - ym)).sum()) / var if var > 0 else 1.0
                g = min(max(g, GAIN[0]), GAIN[1])  # a brightness change, not "explain b by a constant"
                r = float(np.abs(y - (g * xc + ym)).mean())
            else:
                r = float(np.abs(y - x).mean())
            best = min(best, r)
    return best


def ac_directions(coef: np.ndarray) -> np.ndarray:
    """(N, 8, 8) low-frequency DCT blocks -> (N, 63) unit vectors of their AC part: invariant
    to brightness offset and gain, and, unlike the hash bits, smooth under small shifts."""
    v = np.asarray(coef, np.float32).reshape(len(coef), -1)[:, 1:]
    n = np.linalg.norm(v, axis=1, keepdims=True)
    return v / np.maximum(n, 1e-6)


def most_similar(query: np.ndarray, pool: np.ndarray, k: int = SIMILAR_K, chunk: int = 4096) -> np.ndarray:
    """For each query direction the k pool rows of highest cosine, best first: (n_query, k)."""
    k = min(k, len(pool))
    out = np.zeros((len(query), k), np.int64)
    for s in range(0, len(query), chunk):
        sim = query[s : s + chunk] @ pool.T
        top = np.argpartition(-sim, k - 1, axis=1)[:, :k]
        order = np.argsort(-np.take_along_axis(sim, top, axis=1), axis=1, kind="stable")
        out[s : s + chunk] = np.take_along_axis(top, order, axis=1)
    return out


Fetch = Callable[[list], dict]


def judge_by_render(test_rows, train_rows, unchanged: np.ndarray, stored: Fetch,
                    rendered: Callable[[int], np.ndarray]) -> dict:
    """Pairs (global table rows) -> {leak, ambiguous, own, design, cross} arrays.

    `unchanged[row]`: the stored pixels are the row's recorded render (content hash equal), so
    the row explains them with no pixel work; a pair of two such rows is a look-alike by
    design. Otherwise, with `cross` the residual between the two stored images (best shift
    and gain), `own` the plain difference between the test image and its own row's render
    and `design` the residual between the two rows' renders, the pair is a leak when
    cross <= COPY_RATIO * own (the test image sits at most half as far from the training image
    as from its own render) and cross < design (the renders themselves are not that close: a
    near-identical pair the design makes, stored lossily, stays a look-alike). A test image
    that is its own render is a copy only of a training image that is not its own render and
    is nearly identical to it: `own` is then the training image's distance from its render
    and the ratio TRAIN_COPY_RATIO (a training image overwritten with another training
    image's pixels lies closer to a look-alike test image than half its own distance, 0.32x
    in the demo, measured, but not that close). A row that cannot be re-rendered leaves its
    pair ambiguous."""
    t_rows = np.asarray(test_rows, np.int64); r_rows = np.asarray(train_rows, np.int64)
    n = len(t_rows)
    own = np.zeros(n); design = np.full(n, np.nan); cross = np.full(n, np.nan); ratio = np.zeros(n)
    copier = np.full(n, "", dtype=object)  # the image judged as the possible copy; none where both are renders
    need = [k for k in range(n) if not (unchanged[t_rows[k]] and unchanged[r_rows[k]])]
    for part in _chunks(need):
        imgs = stored([int(v) for k in part for v in (t_rows[k], r_rows[k])])
        refs = {row: (imgs[row] if unchanged[row] else rendered(row))  # an unchanged image is its render
                for row in {int(v) for k in part for v in (t_rows[k], r_rows[k])}}
        for k in part:
            t, r = int(t_rows[k]), int(r_rows[k])
            if refs[t] is None or refs[r] is None:
                own[k] = np.nan
                continue
            changed = t if not unchanged[t] else r  # the test image, else the training image
            own[k] = residual(imgs[changed], refs[changed], max_shift=0, gain=False)
            ratio[k] = COPY_RATIO if changed == t else TRAIN_COPY_RATIO
            copier[k] = "test" if changed == t else "train"
            design[k] = residual(refs[r], refs[t])
            cross[k] = residual(imgs[r], imgs[t])
    unknown = np.isnan(own)
    with np.errstate(invalid="ignore"):
        leak = ~unknown & (own > 0) & (cross <= ratio * own) & (cross < design)
    return {"leak": leak, "ambiguous": unknown, "own": own, "design": design, "cross": cross, "copier": copier}


def judge_by_pixels(test_rows, train_rows, stored: Fetch, threshold: float, identical: np.ndarray) -> dict:
    """Pairs -> {leak, delta}: a leak when the normalised residual is under `threshold` (see
    null_threshold) or the pixels are identical."""
    t_rows = np.asarray(test_rows, np.int64); r_rows = np.asarray(train_rows, np.int64)
    delta = np.full(len(t_rows), np.nan)
    for part in _chunks(list(range(len(t_rows)))):
        imgs = stored([int(v) for k in part for v in (t_rows[k], r_rows[k])])
        for k in part:
            delta[k] = normalised_residual(imgs[int(t_rows[k])], imgs[int(r_rows[k])])
    return {"leak": (delta < threshold) | np.asarray(identical, bool), "delta": delta}


def _chunks(items: list, size: int = 256):
    """Bounded slices, so only a few hundred decoded images are held at a time."""
    for s in range(0, len(items), size):
        yield items[s : s + size]


def changed_rows(test_rows: np.ndarray, train_rows: np.ndarray, unchanged: np.ndarray, stored: Fetch,
                 rendered: Callable[[int], np.ndarray], sample: int = 64) -> np.ndarray:
    """Test rows whose stored pixels are not their row's render beyond the store's codec.

    Rows whose content hash matches are unchanged. When most training rows differ too, the
    store is lossy: its codec error is the median own residual of (up to `sample`) training
    rows, and a test row counts as changed above three times that. In a lossless store every
    differing row is changed."""
    rows = np.asarray(test_rows, np.int64)
    differ = rows[~unchanged[rows]]
    train_rows = np.asarray(train_rows, np.int64)
    if len(differ) == 0 or (~unchanged[train_rows]).mean() <= 0.5:
        return differ
    ref = train_rows[np.linspace(0, len(train_rows) - 1, min(sample, len(train_rows))).astype(np.int64)]
    codec = float(np.nanmedian(_own(ref, stored, rendered)))
    own = _own(differ, stored, rendered)
    return differ[~(own <= 3.0 * codec)]  # a row that cannot be re-rendered counts as changed


def _own(rows: np.ndarray, stored: Fetch, rendered) -> np.ndarray:
    """Each row's stored image against its render (grey levels, no shift, no gain)."""
    out: list[float] = []
    for part in _chunks([int(r) for r in rows]):
        imgs = stored(part)
        for r in part:
            ref = rendered(r)
            out.append(np.nan if ref is None else residual(imgs[r], ref, max_shift=0, gain=False))
    return np.array(out)


def pixel_null(train_rows: np.ndarray, hashes: np.ndarray, sha, stored: Fetch, rng: np.random.Generator,
               n: int = NULL_SAMPLES) -> np.ndarray:
    """Normalised residuals between sampled training images and their nearest other training
    image by hash (pixel-identical pairs left out: those are duplicates, not distinct images)."""
    rows = np.asarray(train_rows, np.int64)
    if len(rows) < 2:
        return np.zeros(0)
    pick = rng.choice(rows, size=min(n, len(rows)), replace=False)
    pairs = []
    for r in pick:
        d = hamming(hashes[r], hashes[rows]).astype(np.int64)
        d[rows == r] = 1 << 20
        if sha is not None:
            d[np.asarray(sha, dtype=object)[rows] == sha[r]] = 1 << 20
        j = int(np.argmin(d))
        if d[j] < (1 << 20):
            pairs.append((int(r), int(rows[j])))
    if not pairs:
        return np.zeros(0)
    imgs = stored([v for p in pairs for v in p])
    return np.array([normalised_residual(imgs[a], imgs[b]) for a, b in pairs])


def normalised_residual(a: np.ndarray, b: np.ndarray) -> float:
    """residual() in units of the pair's mean spread: 0 for copies, about 1 for unrelated images."""
    s, r = 0.5 * (spread(a) + spread(b)), residual(a, b)
    return r / s if s > 0 else (0.0 if r == 0 else np.inf)


def null_threshold(null: np.ndarray) -> float:
    """Half the 1st percentile of the null: a pair this close is closer than 99% of distinct
    training neighbours are, by a factor of two."""
    null = np.asarray(null, float)
    null = null[np.isfinite(null)]
    return 0.5 * float(np.quantile(null, NULL_QUANTILE)) if len(null) else 0.0


def hash_null(train_hashes: np.ndarray, rng: np.random.Generator, n: int = 500) -> np.ndarray:
    """Hamming distance from sampled training hashes to their nearest other training hash
    (identical hashes count: without pixels, a repeated hash may be a copy or a look-alike)."""
    h = np.asarray(train_hashes, np.uint64)
    if len(h) < 2:
        return np.zeros(0, np.int64)
    pick = rng.choice(len(h), size=min(n, len(h)), replace=False)
    out = np.empty(len(pick), np.int64)
    for k, i in enumerate(pick):
        d = hamming(h[i], h).astype(np.int64)
        d[i] = 1 << 20
        out[k] = d.min()
    return out
