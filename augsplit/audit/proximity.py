"""Parameter proximity: how close each test row comes to the training rows in parameter space.

Each axis is scaled by its range to [0, 1); circular axes wrap (distance the short way
round), others sit inside a box large enough that nothing wraps. Distances come from
scipy's cKDTree with `boxsize`, overall and within each class.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from .result import FAIL, PASS, WARN, CheckResult, ids_at, top_rows


@dataclass(frozen=True)
class AxisScale:
    """How one parameter column is normalised: value -> (value - lo) / (hi - lo).

    `log` normalises the logarithm instead (for axes sampled log-uniformly, like scale).
    """

    name: str
    lo: float
    hi: float
    periodic: bool = False
    log: bool = False

    def normalise(self, v) -> np.ndarray:
        v = np.asarray(v, dtype=float)
        lo, hi = self.lo, self.hi
        if self.log:
            with np.errstate(divide="ignore", invalid="ignore"):
                v = np.log(v)
            lo, hi = np.log(lo), np.log(hi)
        u = (v - lo) / (hi - lo)
        if self.periodic:
            with np.errstate(invalid="ignore"):  # inf stays non-finite (NaN): reported, not wrapped
                u = np.mod(u, 1.0)
            u[u >= 1.0] = 0.0  # mod of a tiny negative number rounds up to exactly 1
        return u


def normalise(values: np.ndarray, scales: list[AxisScale]) -> np.ndarray:
    """(N, d) parameter values -> (N, d) normalised coordinates (periodic ones in [0, 1))."""
    v = np.asarray(values, dtype=float).reshape(-1, len(scales))
    return np.stack([s.normalise(v[:, i]) for i, s in enumerate(scales)], axis=1) if scales else v


def _boxed(train_u: np.ndarray, test_u: np.ndarray, periodic: np.ndarray):
    """Shift non-periodic coordinates into [0, box) with box > 2 x their spread + 1, so the
    periodic wrap of cKDTree never gives a shorter way round on those axes."""
    both = np.vstack([train_u, test_u])
    lo = both.min(axis=0) if len(both) else np.zeros(train_u.shape[1])
    spread = (both.max(axis=0) - lo) if len(both) else np.zeros(train_u.shape[1])
    box = np.where(periodic, 1.0, np.maximum(3.0, 2.0 * spread + 1.0))
    shift = np.where(periodic, 0.0, 1.0 - lo)  # data start at 1: a margin on both sides
    return train_u + shift, test_u + shift, box


def nearest_distances(train_u: np.ndarray, test_u: np.ndarray, periodic, p: float = 2.0,
                      workers: int = -1) -> tuple[np.ndarray, np.ndarray]:
    """Distance from each test point to its nearest train point, and that point's index.

    Inputs are normalised coordinates (see `normalise`); periodic axes have period 1.
    Returns (inf, -1) for every test point when there are no train points.
    """
    train_u = np.asarray(train_u, dtype=float); test_u = np.asarray(test_u, dtype=float)
    periodic = np.asarray(periodic, dtype=bool)
    if len(test_u) == 0:
        return np.zeros(0), np.zeros(0, dtype=np.int64)
    if len(train_u) == 0:
        return np.full(len(test_u), np.inf), np.full(len(test_u), -1, dtype=np.int64)
    a, b, box = _boxed(train_u, test_u, periodic)
    tree = cKDTree(a, boxsize=box, balanced_tree=False, compact_nodes=False)
    d, i = tree.query(b, k=1, p=p, workers=workers)
    return np.asarray(d, dtype=float), np.asarray(i, dtype=np.int64)


def nearest_by_group(train_u, test_u, periodic, train_group, test_group, p: float = 2.0):
    """`nearest_distances` restricted to pairs in the same group (class); returned indices
    refer to the whole train array. Test rows whose group has no train rows get (inf, -1)."""
    train_group = np.asarray(train_group); test_group = np.asarray(test_group)
    dist = np.full(len(test_u), np.inf); idx = np.full(len(test_u), -1, dtype=np.int64)
    codes, uniq = pd.factorize(np.concatenate([train_group, test_group]))
    tr_c, te_c = codes[: len(train_group)], codes[len(train_group):]
    tr_order = np.argsort(tr_c, kind="stable"); te_order = np.argsort(te_c, kind="stable")
    tr_b = np.searchsorted(tr_c[tr_order], np.arange(len(uniq) + 1))
    te_b = np.searchsorted(te_c[te_order], np.arange(len(uniq) + 1))
    for g in range(len(uniq)):
        tr_rows = tr_order[tr_b[g] : tr_b[g + 1]]; te_rows = te_order[te_b[g] : te_b[g + 1]]
        if len(te_rows) == 0 or len(tr_rows) == 0:
            continue
        d, i = nearest_distances(train_u[tr_rows], test_u[te_rows], periodic, p)
        dist[te_rows] = d; idx[te_rows] = tr_rows[i]
    return dist, idx


def _summary(d: np.ndarray) -> dict:
    finite = d[np.isfinite(d)]
    if len(finite) == 0:
        return {"n": int(len(d)), "min": None, "p01": None, "p05": None, "median": None, "mean": None}
    q = np.quantile(finite, [0.01, 0.05, 0.5])
    return {"n": int(len(d)), "min": float(finite.min()), "p01": float(q[0]), "p05": float(q[1]),
            "median": float(q[2]), "mean": float(finite.mean())}


def _per_class(test_class, d_same: np.ndarray, margin: float | None) -> dict:
    cls = pd.Series(np.asarray(test_class)).astype(str)
    per = {}
    for k, g in cls.groupby(cls, sort=True):
        ix = g.index.to_numpy()
        entry = _summary(d_same[ix])
        if margin is not None:
            entry["n_below_margin"] = int((d_same[ix] < margin).sum())
        per[str(k)] = entry
    return per


def _verdict(n_bad: int, margin: float | None, by_class: bool, d_min) -> tuple[str, str]:
    """With a margin: fail when a test row is closer. Without one: warn when a test row
    repeats a train row's parameters exactly."""
    if margin is not None:
        if n_bad:
            return FAIL, (f"{n_bad} test rows closer than the margin {margin:g} to a train row"
                          + (" of their class" if by_class else ""))
        return PASS, f"every test row is at least {margin:g} from the train rows (min {d_min:.4g})"
    if n_bad:
        return WARN, f"{n_bad} test rows repeat a train row's parameters exactly (no margin declared)"
    return PASS, f"no margin declared; nearest distance {d_min if d_min is not None else float('nan'):.4g}"


def check_proximity(
    train: np.ndarray,
    test: np.ndarray,
    scales: list[AxisScale],
    margin: float | None = None,
    train_class=None,
    test_class=None,
    train_ids=None,
    test_ids=None,
    p: float = 2.0,
    pair: tuple[str, str] | None = None,
    worst_k: int = 20,
    bins: int = 50,
) -> CheckResult:
    """Nearest-train distance of every test row in normalised parameter space.

    The verdict uses same-class distances when classes are given (a held-out region is a
    claim per class), else class-blind ones: fail when any is below `margin`; with no
    declared margin, warn when a test row repeats a train row's parameters exactly.
    """
    tr_u = normalise(train, scales); te_u = normalise(test, scales)
    periodic = np.array([s.periodic for s in scales], dtype=bool)
    d_any, i_any = nearest_distances(tr_u, te_u, periodic, p)
    by_class = train_class is not None and test_class is not None
    if by_class:
        d_same, i_same = nearest_by_group(tr_u, te_u, periodic, train_class, test_class, p)
    else:
        d_same, i_same = d_any, i_any
    n_test = len(te_u)
    train_ids = np.arange(len(tr_u)) if train_ids is None else np.asarray(train_ids)
    test_ids = np.arange(n_test) if test_ids is None else np.asarray(test_ids)
    numbers = {
        "axes": [s.name for s in scales],
        "metric": "euclidean" if p == 2 else f"minkowski_p{p:g}",
        "margin": margin,
        "same_class": bool(by_class),
        "distance": _summary(d_same),
        "distance_any_class": _summary(d_any),
    }
    if margin is not None:
        below = d_same < margin
        numbers["n_below_margin"] = int(below.sum())
        numbers["fraction_below_margin"] = float(below.mean()) if n_test else 0.0
    else:
        below = d_same <= 1e-12
        numbers["n_identical_parameters"] = int(below.sum())
    if by_class:
        numbers["per_class"] = _per_class(test_class, d_same, margin)
    frame = pd.DataFrame({
        "test_row": np.arange(n_test), "test_id": test_ids, "distance": d_same,
        "train_row": i_same,
        "train_id": ids_at(train_ids, i_same),
    })
    if by_class:
        frame.insert(2, "class", np.asarray(test_class))
    worst = top_rows(frame, "distance", worst_k, ascending=True)
    finite = d_same[np.isfinite(d_same)]
    hi = max(float(finite.max()) if len(finite) else 1.0, 1e-9)
    hist, edges = np.histogram(finite, bins=bins, range=(0.0, hi))
    verdict, detail = _verdict(int(below.sum()), margin, by_class, numbers["distance"]["min"])
    return CheckResult("parameter_proximity", verdict, numbers, worst, detail, pair,
                       arrays={"distance_hist": hist, "distance_edges": edges, "margin": margin})
