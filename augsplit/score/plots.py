"""The score report's plots, drawn on `matplotlib.figure.Figure` objects (no pyplot state, the
caller's backend untouched) and returned as embedded PNG `<img>` tags.
"""

from __future__ import annotations

import math

import numpy as np

from .. import figures
from .distance import PERIOD, of_class

COLOURS = ("tab:blue", "tab:orange", "tab:green", "tab:red", "tab:purple", "tab:brown")
STYLES = ("-", "--", ":", "-.")


def img_tag(fig) -> str:
    return figures.img_tag(fig, dpi=90, bbox_inches="tight")


def _errorbar(ax, x, t, **kw) -> None:
    """Accuracy with its interval from a table with accuracy, ci_lo and ci_hi columns."""
    acc = np.asarray(t["accuracy"], dtype=float)
    ax.errorbar(x, acc, yerr=[acc - np.asarray(t["ci_lo"], float), np.asarray(t["ci_hi"], float) - acc], **kw)


def plot_splits(results):
    splits = list(results[0][1].by_split["split"])
    fig = figures.figure(figsize=(max(4, 1.4 * len(splits) * len(results)), 3))
    ax = fig.subplots()
    w = 0.8 / len(results)
    for j, (label, r) in enumerate(results):
        t = r.by_split.set_index("split").reindex(splits)
        x = np.arange(len(splits)) + (j - (len(results) - 1) / 2) * w
        ax.bar(x, t["accuracy"], w, color=COLOURS[j % len(COLOURS)], label=label,
               yerr=[t["accuracy"] - t["ci_lo"], t["ci_hi"] - t["accuracy"]], capsize=3)
        ax.scatter(x, t["chance"], marker="_", color="k", s=200, zorder=3)
    ax.set_xticks(np.arange(len(splits)), splits)
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("accuracy")
    ax.legend(fontsize=8)
    return fig


def _distance_panel(ax, name, results) -> None:
    for j, (label, r) in enumerate(results):
        col = COLOURS[j % len(COLOURS)]
        splits = r.by_split.set_index("split")
        if r.reference_split in splits.index:
            _errorbar(ax, [0], splits.loc[[r.reference_split]], fmt="o", color=col, capsize=3)
        t = r.distance[r.distance["axis"] == name]
        for i, (split, g) in enumerate(t.groupby("split", sort=True)):
            _errorbar(ax, g["mean_distance"], g, color=col, ls=STYLES[i % len(STYLES)], marker=".", capsize=2,
                      label=f"{label}: {split}")
            ax.axhline(splits.loc[split, "chance"], color="grey", ls="--", lw=0.8)
    unit = results[0][1].distance.loc[results[0][1].distance["axis"] == name, "unit"]
    ref = of_class(results[0][1].distance_reference)
    ax.set_xlabel(f"{name} ({unit.iloc[0] if len(unit) else ''}) to {ref}")
    ax.set_ylim(0, 1.05)
    ax.set_ylabel("accuracy")


def plot_distance(results):
    names = list(dict.fromkeys(a for _, r in results for a in r.distance.loc[r.distance["held_out_along"], "axis"]))
    names = names or list(dict.fromkeys(a for _, r in results for a in r.distance["axis"]))
    fig = figures.figure(figsize=(4 * len(names), 3.2))
    axs = fig.subplots(1, len(names), squeeze=False)
    for ax, name in zip(axs[0], names):
        _distance_panel(ax, name, results)
    fig_legend(fig, axs.ravel())
    return fig


def _shade(ax, intervals, kind: str, lo: float) -> None:
    """Grey where the training images lie; a circular interval with a > b wraps past lo + 360."""
    for a, b in intervals:
        if kind == "circular" and a > b:
            ax.axvspan(a, lo + PERIOD, color="0.85")
            ax.axvspan(lo, b, color="0.85")
        else:
            ax.axvspan(a, b, color="0.85")


def _log_ticks(ax) -> None:
    from matplotlib.ticker import NullLocator

    ax.set_xscale("log", base=2)
    lo, hi = ax.get_xlim()
    ticks = np.exp2(np.linspace(np.log2(lo), np.log2(hi), 5)[1:-1])
    ax.set_xticks(ticks, [f"{t:.3g}" for t in ticks])
    ax.xaxis.set_minor_locator(NullLocator())


def _value_panel(ax, name, results) -> None:
    info = results[0][1].train_ranges.get(name, {})
    axis_lo = info.get("wrap_lo", 0.0)
    wraps = any(a > b for a, b in info.get("intervals", []))
    _shade(ax, info.get("intervals", []), info.get("kind", ""), axis_lo)
    for j, (label, r) in enumerate(results):
        t = r.by_value[r.by_value["axis"] == name]
        for i, (split, g) in enumerate(t.groupby("split", sort=True)):
            g = g.sort_values("centre")
            wraps = wraps or bool((g["lo"] > g["hi"]).any())
            _errorbar(ax, g["centre"], g, color=COLOURS[j % len(COLOURS)], ls=STYLES[i % len(STYLES)], marker=".",
                      capsize=2, label=f"{label}: {split}")
    if info.get("kind") == "log":
        _log_ticks(ax)
    if info.get("kind") == "circular" and wraps:
        ax.set_xlim(axis_lo, axis_lo + PERIOD)  # a wrapping interval is drawn at both ends of the range
    ax.set_xlabel(f"{name} ({info.get('unit', '')})")
    ax.set_ylim(0, 1.05)


def plot_values(results):
    names = list(dict.fromkeys(a for _, r in results for a in r.by_value["axis"]))
    ncol = min(3, len(names))
    nrow = math.ceil(len(names) / ncol)
    fig = figures.figure(figsize=(4.2 * ncol, 3 * nrow))
    axs = fig.subplots(nrow, ncol, squeeze=False)
    for ax, name in zip(axs.ravel(), names):
        _value_panel(ax, name, results)
    for ax in axs.ravel()[len(names):]:
        ax.axis("off")
    fig_legend(fig, axs.ravel())
    return fig


def fig_legend(fig, axes) -> None:
    """One legend under all panels, so no curve is hidden behind it."""
    seen = {}
    for ax in axes:
        for h, lab in zip(*ax.get_legend_handles_labels()):
            seen.setdefault(lab, h)
    fig.tight_layout(rect=(0, 0.1 if seen else 0, 1, 1))
    if seen:
        fig.legend(list(seen.values()), list(seen), loc="lower center", ncol=min(4, len(seen)), fontsize=8,
                   frameon=False)
