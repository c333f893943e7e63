"""`augsplit preview DIR`: pictures a person opens to see what a dataset holds.

A contact sheet per split (a grid of its images, each captioned with its class and the values of
the axes the spec varies) and a coverage map: how often each canvas pixel is covered by an
object of each split, train and test in different colours, with the pixels both touch counted
(under a per-class footprint guarantee, only pixels an object of the same class touches in both).
Figures are `matplotlib.figure.Figure` objects: the caller's backend and pyplot state are untouched.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .build import Built
from .dataset import image_of, open_dataset, read_rows
from .dataset import layout as lay
from . import figures
from .errors import DatasetError
from .render import add_footprint, footprint
from .report_folder import check_report_folder, report_set
from .scene import render_params
from .space.axes import ANGLE_AXES
from .threads import one_opencv_thread

PREVIEW_DIR = lay.PREVIEW_DIR
COVERAGE_FILE = "coverage.png"
MAX_COVERAGE_ROWS = 20000  # per split; more rows are sampled evenly (the title says so)

# per-role colour families: train blue; test splits warm, one hue each (matplotlib colormaps)
TRAIN_CMAPS = ("Blues", "Greens", "Purples", "Greys")
TEST_CMAPS = ("Oranges", "Reds", "YlOrBr", "RdPu")
TRAIN_RGB = np.array([0.12, 0.40, 0.85])
TEST_RGB = np.array([0.95, 0.45, 0.05])

_DEG_AXES = set(ANGLE_AXES)  # circular axes in degrees (the axis catalogue)
ALL, PER_CLASS = "all", "per class"  # what a footprint guarantee excludes: any shared pixel, or same-class ones


@dataclass(frozen=True)
class Coverage:
    """Per split: how many of its (sampled) images cover each canvas pixel, and per class which
    pixels its images of that class cover."""

    counts: dict  # split name -> (H, W) int array
    sampled: dict  # split name -> (rows used, rows in the split)
    roles: dict  # split name -> "train" | "test"
    by_class: dict = field(default_factory=dict)  # split name -> {class index: (H, W) bool array}

    def union(self, role: str) -> np.ndarray:
        maps = [c for name, c in self.counts.items() if self.roles[name] == role]
        return np.sum(maps, axis=0) if maps else None

    def shared(self, split: str, per_class: bool = False) -> np.ndarray:
        """Pixels the split's objects cover that some train split's objects cover too; with
        `per_class`, only pixels that objects of one class cover in both."""
        trains = [n for n in self.counts if self.roles[n] == "train" and n != split]
        if not per_class:
            train = self.union("train")
            return np.zeros(self.counts[split].shape, bool) if train is None else (train > 0) & (self.counts[split] > 0)
        out = np.zeros(self.counts[split].shape, bool)
        for c, mask in self.by_class.get(split, {}).items():
            for t in trains:
                other = self.by_class.get(t, {}).get(c)
                if other is not None:
                    out |= mask & other
        return out

    def shared_pixels(self) -> int:
        """Canvas pixels covered by some train image and by some test image."""
        tr, te = self.union("train"), self.union("test")
        if tr is None or te is None:
            return 0
        return int(np.count_nonzero((tr > 0) & (te > 0)))


@one_opencv_thread
def preview(root: str | Path, out: str | Path | None = None, per_split: int = 24, columns: int = 6,
            allow_incomplete: bool = False) -> list[Path]:
    """Write one contact sheet per split and the coverage map; return their paths. An
    unfinished folder is refused unless `allow_incomplete` (then what is made so far shows)."""
    if per_split < 1:
        raise DatasetError(f"need at least one image per split, got {per_split}", where="per_split / --per-split")
    if columns < 1:
        raise DatasetError(f"need at least one column, got {columns}", where="columns / --columns")
    folder = open_dataset(root, allow_incomplete=allow_incomplete)
    root, built = folder.root, folder.built
    out = out if out is not None else root / PREVIEW_DIR
    # a folder (or its list) it may not write in, or a user's file of a sheet's name: before the work
    check_report_folder(out, [*(sheet_name(s.name) for s in built.plan.splits), COVERAGE_FILE], [root])
    df = read_rows(folder)
    if df.empty:
        raise DatasetError("the dataset has no manifest rows to preview", where=str(root / lay.MANIFEST_DIR))
    # every image a sheet shows is read (and a stored one held to its recorded checksum: a
    # sheet never shows an image changed since it was made under its row's caption) before any
    # file is written, so a damaged one leaves no half-made set of sheets behind
    sheets = {}
    for s in built.plan.splits:
        rows = df[df["split"] == s.name]
        if len(rows):
            pick = rows.iloc[pick_rows(len(rows), per_split)]
            sheets[sheet_name(s.name)] = (len(rows), [(row, image_of(folder, row, checked=True))
                                                               for _, row in pick.iterrows()])
    cov = coverage(built, df)
    with report_set(out, "preview", [*sheets, COVERAGE_FILE], [root]) as out:
        paths = [out.write(name, contact_sheet(built, shown, n_rows, columns))
                 for name, (n_rows, shown) in sheets.items()]
        paths.append(out.write(COVERAGE_FILE, coverage_figure(built, cov)))
    return paths


# ---- contact sheets ------------------------------------------------------------------------------


def sheet_name(split: str) -> str:
    return f"contact_{split}.png"


def pick_rows(n_rows: int, k: int) -> np.ndarray:
    """k row positions spread evenly over 0..n_rows-1 (classes come in blocks, so every class
    shows up when k is at least the number of classes)."""
    if n_rows <= k:
        return np.arange(n_rows)
    return np.unique(np.floor((np.arange(k) + 0.5) * n_rows / k).astype(int))


def varied_axes(built: Built) -> list[str]:
    return [n for n in built.plan.space.names if n != "class"]


def caption(built: Built, row) -> str:
    """Class, then each varied axis in the spec's own unit, two to a line."""
    parts = []
    for name in varied_axes(built):
        v = float(row[name])
        unit = built.plan.space[name].unit
        if name == "mirror":
            parts.append("mirrored" if v >= 0.5 else "not mirrored")
        elif name in _DEG_AXES or unit == "deg":
            parts.append(f"{name} {v:.1f}°")
        elif unit in ("", "x"):
            parts.append(f"{name} {v:.2f}")
        else:
            parts.append(f"{name} {v:.1f} {unit}")
    lines = [f"{row['class_name']}  #{int(row['index'])}"]
    lines += ["  ".join(parts[i:i + 2]) for i in range(0, len(parts), 2)]
    return "\n".join(lines)


def contact_sheet(built: Built, shown: list, n_rows: int, columns: int = 6) -> bytes:
    """The sheet (PNG) of one split's `shown` (manifest row, image) pairs, of its `n_rows` rows."""
    n = len(shown)
    cols = min(columns, n)
    nrows = math.ceil(n / cols)
    lines = 1 + math.ceil(len(varied_axes(built)) / 2)
    # laid out in inches, so captions never run into the image above however many lines they take
    img, gap, cap, top, margin = 1.8, 0.18, 0.03 + 0.115 * lines, 0.45, 0.15
    cell_h = cap + img + gap
    width, height = 2 * margin + cols * img + (cols - 1) * gap, top + nrows * cell_h + margin - gap
    fig = figures.figure(figsize=(width, height))
    split = built.plan.split(shown[0][0]["split"])
    for i, (row, im) in enumerate(shown):
        r, c = divmod(i, cols)
        x0 = margin + c * (img + gap)
        y0 = height - top - r * cell_h - cap - img
        ax = fig.add_axes((x0 / width, y0 / height, img / width, img / height))
        if im.shape[2] == 1:
            ax.imshow(im[..., 0], cmap="gray", vmin=0, vmax=255, interpolation="nearest")
        else:
            ax.imshow(im, interpolation="nearest")
        ax.set_xticks([])
        ax.set_yticks([])
        for spine in ax.spines.values():
            spine.set_color("0.6")
        fig.text(x0 / width, (y0 + img + 0.03) / height, caption(built, row), fontsize=6.5, family="monospace",
                 ha="left", va="bottom", linespacing=1.15)
    kind = f"{split.role}, {split.kind}" if split.kind != split.role else split.role
    fig.text(margin / width, 1 - 0.12 / height, f"split '{split.name}' ({kind}): {n} of {n_rows} images, "
             "evenly spaced by index", fontsize=10, ha="left", va="top")
    return figures.png(fig, dpi=110)


# ---- coverage ------------------------------------------------------------------------------------


def coverage(built: Built, df, max_rows: int = MAX_COVERAGE_ROWS) -> Coverage:
    """Footprint counts per split, from the renderer's own footprints at each row's parameters."""
    h, w = built.plan.canvas.height, built.plan.canvas.width
    thr = built.plan.render.alpha_threshold
    counts, sampled, roles, by_class = {}, {}, {}, {}
    for s in built.plan.splits:
        rows = df[df["split"] == s.name]
        if not len(rows):
            continue
        pick = rows.iloc[pick_rows(len(rows), max_rows)]
        acc = np.zeros((h, w), dtype=np.int64)
        masks: dict[int, np.ndarray] = {}
        cls, inst = pick["class_index"].to_numpy(), pick["instance"].to_numpy()
        for i, (_, row) in enumerate(pick.iterrows()):
            sprite = built.source.sprite(int(cls[i]), int(inst[i]))
            fp = footprint(sprite, render_params(row), (h, w), thr)
            add_footprint(acc, fp)
            if int(cls[i]) not in masks:
                masks[int(cls[i])] = np.zeros((h, w), dtype=np.int64)
            add_footprint(masks[int(cls[i])], fp)
        counts[s.name], sampled[s.name], roles[s.name] = acc, (len(pick), len(rows)), s.role
        by_class[s.name] = {c: m > 0 for c, m in masks.items()}
    return Coverage(counts, sampled, roles, by_class)


def overlay(train: np.ndarray | None, test: np.ndarray | None, shared: np.ndarray | None = None) -> np.ndarray:
    """An RGB picture: train coverage in blue, test in orange, on white; a pixel both touch
    (or, when given, a pixel of `shared`) is drawn black so a leak cannot hide in a blend."""
    shape = (train if train is not None else test).shape
    rgb = np.ones(shape + (3,))
    for m, colour in ((train, TRAIN_RGB), (test, TEST_RGB)):
        if m is None:
            continue
        # log scale: a pixel touched once must stay visible next to one touched thousands of times
        a = np.log1p(m) / max(np.log1p(m.max()), 1e-9)
        a = np.where(m > 0, 0.25 + 0.75 * a, 0.0)[..., None]
        rgb = rgb * (1 - a) + colour * a
    if shared is not None:
        rgb[shared] = 0.0
    elif train is not None and test is not None:
        rgb[(train > 0) & (test > 0)] = 0.0
    return rgb


def coverage_figure(built: Built, cov: Coverage) -> bytes:
    """The coverage figure (PNG). Top row: one heat map per split. Bottom row: each test split
    over all train splits."""
    from matplotlib.patches import Patch

    names = list(cov.counts)
    tests = [n for n in names if cov.roles[n] == "test"]
    train = cov.union("train")
    ncols = max(len(names), len(tests), 1)
    nrows = 2 if tests and train is not None else 1
    fig, axes = figures.subplots(nrows, ncols, figsize=(3.5 * ncols, 3.6 * nrows + 0.5), squeeze=False)
    for ax in axes.ravel():
        ax.set_axis_off()
    cmaps = {"train": iter(TRAIN_CMAPS * 4), "test": iter(TEST_CMAPS * 4)}
    for ax, name in zip(axes[0], names):
        _split_panel(fig, ax, built.plan.split(name), cov, next(cmaps[cov.roles[name]]))
    if nrows == 2:
        promises = [footprint_guarantee(built, name) for name in tests]
        for ax, name, promise in zip(axes[1], tests, promises):
            _pair_panel(ax, name, cov, promise)
        both = "both, same class" if PER_CLASS in promises else "both"
        axes[1][0].legend(handles=[Patch(color=TRAIN_RGB, label="train"), Patch(color=TEST_RGB, label="test"),
                                   Patch(color="black", label=both)], loc="upper left",
                          bbox_to_anchor=(0.0, -0.02), ncol=3, fontsize=7, frameon=False)
    c = built.plan.canvas
    fig.suptitle(f"Where each split's objects landed\n{c.width}x{c.height} canvas; object footprints "
                 "re-made from the manifest rows", fontsize=10)
    fig.tight_layout()
    return figures.png(fig, dpi=110)


def _split_panel(fig, ax, split, cov: Coverage, cmap: str) -> None:
    """One split's heat map: how many of its images cover each pixel."""
    m = cov.counts[split.name]
    im = ax.imshow(np.ma.masked_equal(m, 0), cmap=cmap, interpolation="nearest")
    used, total = cov.sampled[split.name]
    of = f"{used} images" if used == total else f"{used} of {total} images"
    kind = split.role if split.kind == split.role else f"{split.role}, {split.kind}"
    ax.set_title(f"{split.name} ({kind})\n{of}; {np.count_nonzero(m)} px covered", fontsize=9)
    fig.colorbar(im, ax=ax, fraction=0.046, pad=0.03).set_label("images covering the pixel", fontsize=7)
    _frame(ax, m.shape)


def _pair_panel(ax, name: str, cov: Coverage, promise: str | None) -> None:
    """A test split over every train split; the pixels both touch black (under a per-class
    guarantee, only pixels an object of the same class touches in both)."""
    m = cov.counts[name]
    per_class = promise == PER_CLASS
    shared = cov.shared(name, per_class)
    ax.imshow(overlay(cov.union("train"), m, shared), interpolation="nearest")
    n = int(np.count_nonzero(shared))
    what = "same-class pixels in both splits" if per_class else "pixels touched by both"
    note = {PER_CLASS: "\n(per-class guarantee: the spec guarantees 0\nfor objects of the same class)",
            ALL: " (the spec guarantees 0)"}.get(promise, "")
    ax.set_title(f"train (blue) vs {name} (orange)\n{what}: {n}{note}", fontsize=9,
                 color="firebrick" if promise and n else "black")
    _frame(ax, m.shape)


def footprint_guarantee(built: Built, test_split: str) -> str | None:
    """How the plan guarantees disjoint footprints between this split and a train split: ALL
    (no pixel shared), PER_CLASS (no pixel shared by objects of one class), or None."""
    trains = {s.name for s in built.plan.splits if s.role == "train"}
    found = [v.per_class for v in built.plan.verdicts
             if v.kind == "footprint" and test_split in v.between and trains & set(v.between)]
    if not found:
        return None
    return PER_CLASS if all(found) else ALL



def _frame(ax, shape) -> None:
    """Show the canvas border (white pixels would otherwise merge with the page)."""
    from matplotlib.patches import Rectangle

    h, w = shape
    ax.add_patch(Rectangle((-0.5, -0.5), w, h, fill=False, lw=0.8, ec="0.5", clip_on=False))
    ax.set_xticks([])
    ax.set_yticks([])
