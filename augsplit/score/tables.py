"""The accuracy tables score builds from its per-image rows: per split / class / cell, against
distance from the training images, against each axis value, the gaps to the reference split
with their verdicts, and two prediction files side by side.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from augsplit.manifest import UNITS

from .distance import PERIOD, VALUE_AXES, arc_start, train_spacing, wrap
from .statistics import bootstrap_gap, mcnemar_p, wilson_interval

DISTANCE_COLUMNS = ["axis", "unit", "split", "bin", "lo", "hi", "mean_distance", "n", "k", "train_spacing",
                    "held_out_along"]
VALUE_COLUMNS = ["axis", "unit", "split", "bin", "lo", "hi", "centre", "n", "k", "n_train_in_bin"]
GAP_COLUMNS = ["split", "reference", "reference_accuracy", "accuracy", "gap", "gap_lo", "gap_hi", "n_reference", "n"]


def with_wilson(t: pd.DataFrame, confidence: float) -> pd.DataFrame:
    """Add accuracy = k / n and its Wilson interval to a table with counts n and k."""
    t["accuracy"] = t["k"] / t["n"] if len(t) else []
    t["ci_lo"], t["ci_hi"] = wilson_interval(t["k"].to_numpy(), t["n"].to_numpy(), confidence)
    return t


def accuracy_table(rows: pd.DataFrame, by: list[str], ks, confidence) -> pd.DataFrame:
    agg = {"n": ("correct", "size"), "k": ("correct", "sum")}
    for k in ks:
        agg[f"k_top{k}"] = (f"top{k}_correct", "sum")
    t = rows.groupby(by, sort=True, observed=True).agg(**agg).reset_index()
    t["n"] = t["n"].astype(int)
    t["k"] = t["k"].astype(int)
    t["accuracy"] = t["k"] / t["n"]
    t["ci_lo"], t["ci_hi"] = wilson_interval(t["k"], t["n"], confidence)
    for k in ks:
        kk = t.pop(f"k_top{k}").astype(int)
        t[f"top{k}"] = kk / t["n"]
        t[f"top{k}_lo"], t[f"top{k}_hi"] = wilson_interval(kk, t["n"], confidence)
    return t


def add_coverage(t: pd.DataFrame, manifest: pd.DataFrame) -> pd.DataFrame:
    total = manifest.groupby("split").size()
    t = t.set_index("split")
    t.insert(0, "n_images", total.reindex(t.index).astype(int))
    t.insert(1, "coverage", t["n"] / t["n_images"])
    return t.reset_index()


def add_chance(t: pd.DataFrame, rows: pd.DataFrame) -> pd.DataFrame:
    # the best constant guess scores the majority class's share of the split
    major = rows.groupby("split", observed=True)["class_index"].agg(lambda s: s.value_counts().iloc[0] / len(s))
    t["chance"] = t["split"].map(major).astype(float)
    return t


# ---- distance from the training images -------------------------------------------------------


def _bins(d: np.ndarray, n_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Equal-count bin edges of the distances, and each distance's bin."""
    edges = np.unique(np.quantile(d, np.linspace(0, 1, n_bins + 1)))
    b = np.searchsorted(edges[1:-1], d, side="right") if edges.size > 1 else np.zeros(d.size, int)
    return edges, b


def distance_table(rows, manifest, axes, train_split, n_bins, confidence, same_class: bool = False) -> pd.DataFrame:
    """Accuracy in equal-count bins of distance from the training images, per axis and held-out
    split. Rows without a distance (no training image of their class) are left out."""
    out = []
    train = manifest[manifest["split"] == train_split]
    for ax in axes:
        classes = train["class_index"].to_numpy() if same_class else None
        spacing = train_spacing(train[list(ax.columns)].to_numpy(dtype=float), ax.kind, classes)
        for split, g in rows.groupby("split", sort=True, observed=True):
            d = g[f"dist_{ax.name}"].to_numpy(dtype=float)
            known = np.isfinite(d)
            if split == train_split or not known.any():
                continue
            d, c = d[known], g["correct"].to_numpy(dtype=bool)[known]
            edges, b = _bins(d, n_bins)
            beyond = bool(np.median(d) > spacing)
            for i in np.unique(b):
                m = b == i
                out.append({"axis": ax.name, "unit": ax.unit, "split": split, "bin": int(i),
                            "lo": float(edges[i]), "hi": float(edges[min(i + 1, edges.size - 1)]),
                            "mean_distance": float(d[m].mean()), "n": int(m.sum()), "k": int(c[m].sum()),
                            "train_spacing": spacing, "held_out_along": beyond})
    return with_wilson(pd.DataFrame(out, columns=DISTANCE_COLUMNS), confidence)


# ---- accuracy against each axis value --------------------------------------------------------


class _Scale:
    """Where values are binned (u) and how a bin edge reads back as an axis value.

    Circular axes are binned along the shortest arc that holds every value, and read back
    wrapped into the axis range [lo, lo + 360) (a bin or interval may then wrap: lo > hi)."""

    def __init__(self, kind: str, allv: np.ndarray, axis_lo: float = 0.0):
        self.kind, self.axis_lo = kind, axis_lo
        self.start = arc_start(allv) if kind == "circular" else 0.0

    def to_u(self, v) -> np.ndarray:
        v = np.asarray(v, dtype=float)
        if self.kind == "circular":
            return self.start + np.mod(v - self.start, PERIOD)
        return np.log2(v) if self.kind == "log" else v

    def from_u(self, u) -> np.ndarray:
        if self.kind == "circular":
            return wrap(u, self.axis_lo)
        return np.exp2(u) if self.kind == "log" else np.asarray(u, dtype=float)


def _value_rows(ax, scale: _Scale, edges, rows, tv, n_bins) -> list[dict]:
    unit = UNITS.get(ax.column, "")
    bin_of = lambda u: np.clip(np.searchsorted(edges, u, side="right") - 1, 0, n_bins - 1)  # noqa: E731
    b = bin_of(scale.to_u(rows[ax.column].to_numpy(dtype=float)))
    tb = np.bincount(bin_of(scale.to_u(tv)), minlength=n_bins)
    frame = pd.DataFrame({"split": rows["split"].to_numpy(), "bin": b, "correct": rows["correct"].to_numpy()})
    agg = frame.groupby(["split", "bin"], observed=True).agg(n=("correct", "size"), k=("correct", "sum")).reset_index()
    return [{"axis": ax.column, "unit": unit, "split": r.split, "bin": int(r.bin),
             "lo": float(scale.from_u(edges[r.bin])), "hi": float(scale.from_u(edges[r.bin + 1])),
             "centre": float(scale.from_u((edges[r.bin] + edges[r.bin + 1]) / 2)),
             "n": int(r.n), "k": int(r.k), "n_train_in_bin": int(tb[r.bin])} for r in agg.itertuples(index=False)]


def value_table(manifest, rows, train_split, n_bins, confidence, axis_lo: dict | None = None):
    """Accuracy against each varied axis value, per split, and the training rows' occupied ranges.

    Every value reported for a circular axis lies in its range [lo, lo + 360), `axis_lo`
    giving lo per column (default 0)."""
    out, ranges = [], {}
    train = manifest[manifest["split"] == train_split]
    for ax in VALUE_AXES:
        if ax.column not in manifest.columns:
            continue
        allv = manifest[ax.column].to_numpy(dtype=float)
        if not np.isfinite(allv).all() or np.ptp(allv) == 0:
            continue
        scale = _Scale(ax.kind, allv, (axis_lo or {}).get(ax.column, 0.0))
        tv = train[ax.column].to_numpy(dtype=float)
        ua = scale.to_u(allv)
        edges = np.linspace(float(ua.min()), float(ua.max()), n_bins + 1)
        ivals = [[float(scale.from_u(a)), float(scale.from_u(b))]
                 for a, b in occupied(scale.to_u(tv), float(ua.max() - ua.min()))]
        ranges[ax.column] = {"unit": UNITS.get(ax.column, ""), "kind": ax.kind, "intervals": ivals,
                             **({"wrap_lo": scale.axis_lo} if ax.kind == "circular" else {})}
        out += _value_rows(ax, scale, edges, rows, tv, n_bins)
    return with_wilson(pd.DataFrame(out, columns=VALUE_COLUMNS), confidence), ranges


def occupied(u: np.ndarray, span: float) -> list[tuple[float, float]]:
    """Intervals the training values fill: split where a gap exceeds 5% of the span.

    The 5% threshold is common practice, no source; it separates held-out bands from the
    spacing of a few hundred uniformly drawn training values.
    """
    if u.size == 0:
        return []
    s = np.sort(u)
    cut = np.flatnonzero(np.diff(s) > 0.05 * span)
    starts = np.concatenate([[0], cut + 1])
    stops = np.concatenate([cut, [s.size - 1]])
    return [(float(s[a]), float(s[b])) for a, b in zip(starts, stops)]


# ---- gaps and verdicts -----------------------------------------------------------------------


def gap_table(rows, splits, train_split, reference_split, n_boot, seed, confidence) -> pd.DataFrame:
    ref = rows.loc[rows["split"] == reference_split, "correct"].to_numpy(dtype=bool)
    held = [s for s in splits if s not in (train_split, reference_split)]
    streams = np.random.SeedSequence(seed).spawn(max(1, len(splits)))
    out = []
    for s in held:
        h = rows.loc[rows["split"] == s, "correct"].to_numpy(dtype=bool)
        rng = np.random.default_rng(streams[splits.index(s)])
        gap, lo, hi = bootstrap_gap(ref, h, n_boot=n_boot, confidence=confidence, rng=rng)
        out.append({"split": s, "reference": reference_split,
                    "reference_accuracy": float(ref.mean()) if ref.size else math.nan,
                    "accuracy": float(h.mean()) if h.size else math.nan,
                    "gap": gap, "gap_lo": lo, "gap_hi": hi, "n_reference": int(ref.size), "n": int(h.size)})
    return pd.DataFrame(out, columns=GAP_COLUMNS)


def verdict(gap_row, by_split: pd.DataFrame) -> str:
    s = gap_row["split"]
    if not np.isfinite(gap_row["gap"]):
        return f"{s}: no predictions for this split or its reference"
    r = by_split.set_index("split").loc[s]
    head = (f"{s}: accuracy {r['accuracy']:.3f} [{r['ci_lo']:.3f}, {r['ci_hi']:.3f}] vs "
            f"{gap_row['reference']} {gap_row['reference_accuracy']:.3f}; gap {gap_row['gap']:+.3f} "
            f"[{gap_row['gap_lo']:+.3f}, {gap_row['gap_hi']:+.3f}]")
    if r["ci_lo"] <= r["chance"]:
        what = f"not distinguishable from chance ({r['chance']:.3f})"
    elif gap_row["gap_lo"] > 0:
        what = "above chance but below the training region: partial transfer"
    else:
        what = "no measurable drop from the training region"
    return f"{head} -- {what}"


# ---- two prediction files --------------------------------------------------------------------


def compare_rows(a_rows: pd.DataFrame, b_rows: pd.DataFrame, split_order, labels: tuple[str, str]) -> pd.DataFrame:
    """Side-by-side accuracy per split of two prediction files' per-image rows, with the exact
    McNemar test of the paired difference."""
    la, lb = labels
    m = a_rows[["image_id", "split", "correct"]].merge(
        b_rows[["image_id", "correct"]], on="image_id", suffixes=(f"_{la}", f"_{lb}"))
    out = []
    for split, g in m.groupby("split", sort=False):
        ca, cb = g[f"correct_{la}"].to_numpy(bool), g[f"correct_{lb}"].to_numpy(bool)
        only_a, only_b = int((ca & ~cb).sum()), int((~ca & cb).sum())
        out.append({"split": split, "n": len(g), f"accuracy_{la}": ca.mean(), f"accuracy_{lb}": cb.mean(),
                    "difference": ca.mean() - cb.mean(), f"only_{la}_correct": only_a,
                    f"only_{lb}_correct": only_b, "mcnemar_p": mcnemar_p(only_a, only_b)})
    t = pd.DataFrame(out)
    order = {s: i for i, s in enumerate(split_order)}
    return t.sort_values("split", key=lambda s: s.map(order)).reset_index(drop=True)
