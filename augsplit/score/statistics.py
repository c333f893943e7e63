"""The statistics score reports: Wilson intervals, bootstrap intervals of a mean and of a gap,
expected calibration error, chance bounds and the exact McNemar test. Pure functions over arrays.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import stats

CONFIDENCE = 0.95
N_BOOT = 2000
SEED = 20240601


def wilson_interval(k, n, confidence: float = CONFIDENCE) -> tuple[np.ndarray, np.ndarray]:
    """Wilson (1927) score interval for a binomial proportion k/n; NaN where n == 0."""
    shape = np.broadcast(np.asarray(k), np.asarray(n)).shape
    k = np.atleast_1d(np.asarray(k, dtype=float))
    n = np.atleast_1d(np.asarray(n, dtype=float))
    k, n = np.broadcast_arrays(k, n)
    z = stats.norm.ppf(0.5 + confidence / 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = k / n
        denom = 1 + z * z / n
        centre = (p + z * z / (2 * n)) / denom
        half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
        lo = np.clip(centre - half, 0.0, 1.0)
        hi = np.clip(centre + half, 0.0, 1.0)
    # at k == 0 or k == n the bound is exactly the estimate; remove float fuzz there
    lo = np.where(k == 0, 0.0, lo)
    hi = np.where(k == n, 1.0, hi)
    lo = np.where(n > 0, lo, np.nan).reshape(shape)
    hi = np.where(n > 0, hi, np.nan).reshape(shape)
    return lo, hi


def bootstrap_mean_ci(values, *, n_boot: int = N_BOOT, confidence: float = CONFIDENCE,
                      rng: np.random.Generator) -> tuple[float, float]:
    """Percentile bootstrap interval of the mean, resampling the values with replacement."""
    v = np.asarray(values, dtype=float).ravel()
    if v.size == 0:
        return (math.nan, math.nan)
    means = np.empty(n_boot)
    chunk = max(1, 4_000_000 // v.size)  # bounds memory at a few tens of MB
    for start in range(0, n_boot, chunk):
        stop = min(n_boot, start + chunk)
        idx = rng.integers(0, v.size, size=(stop - start, v.size))
        means[start:stop] = v[idx].mean(axis=1)
    a = (1 - confidence) / 2
    lo, hi = np.quantile(means, [a, 1 - a])
    return float(lo), float(hi)


def bootstrap_gap(correct_ref, correct_held, *, n_boot: int = N_BOOT, confidence: float = CONFIDENCE,
                  rng: np.random.Generator) -> tuple[float, float, float]:
    """Accuracy gap mean(ref) - mean(held) with a percentile bootstrap interval over images.

    Each split is resampled on its own (the two are independent samples). For 0/1 outcomes the
    number correct in a resample of n images is exactly Binomial(n, k/n), so drawing that count
    is the same bootstrap as resampling image indices, at a cost independent of n.
    """
    r = np.asarray(correct_ref, dtype=bool)
    h = np.asarray(correct_held, dtype=bool)
    if r.size == 0 or h.size == 0:
        return (math.nan, math.nan, math.nan)
    gap = r.mean() - h.mean()
    boot = rng.binomial(r.size, r.mean(), n_boot) / r.size - rng.binomial(h.size, h.mean(), n_boot) / h.size
    a = (1 - confidence) / 2
    lo, hi = np.quantile(boot, [a, 1 - a])
    return float(gap), float(lo), float(hi)


def expected_calibration_error(confidence, correct, n_bins: int = 10) -> float:
    """Expected calibration error: sum over equal-width confidence bins of (n_b / n) times
    |accuracy_b - mean confidence_b| (Naeini et al., 2015; Guo et al., 2017). Confidence is
    the probability the model gave its predicted class."""
    conf = np.asarray(confidence, dtype=float)
    ok = np.asarray(correct, dtype=float)
    if conf.size == 0:
        return math.nan
    b = np.clip((conf * n_bins).astype(int), 0, n_bins - 1)  # bins (i/n, (i+1)/n], 1.0 in the last
    b = np.where((conf * n_bins == b) & (b > 0), b - 1, b)
    n = np.bincount(b, minlength=n_bins)
    gap = np.abs(np.bincount(b, ok, n_bins) - np.bincount(b, conf, n_bins))
    return float(gap.sum() / conf.size) if n.sum() else math.nan


def chance_bounds(n: int, p: float, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """Accuracy range a guesser with hit rate p reaches on n images (central binomial interval)."""
    lo, hi = stats.binom.interval(confidence, n, p)
    return float(lo) / n, float(hi) / n


def mcnemar_p(only_a: int, only_b: int) -> float:
    """Exact McNemar test (McNemar, 1947): a two-sided binomial test of the discordant pairs."""
    return float(stats.binomtest(only_a, only_a + only_b, 0.5).pvalue) if only_a + only_b else 1.0
