"""Holdout kinds, as the generalisation literature names them, and the composition check.

A test split is labelled by comparing its region with the union of the training regions,
axis by axis, the class included: `random` (drawn from the training region itself),
`composition` (every value of every axis, class included, is seen in training, only the
combination is new), `interpolation` (some values are unseen but lie between seen ones; any
held-out arc of a circular axis) and `extrapolation` (some values lie beyond every seen
value). A class no training split shows is a value outside the training support of a
nominal axis, where nothing lies "between" seen values: extrapolation (the novel-class case),
never composition, which needs every marginal value seen.
"""

from __future__ import annotations

from ..space.axes import CIRCULAR, CLASS, Space
from ..space.region import Region, _merge
from .regions import t_interval_text



def projection(region: Region, i: int) -> list[tuple[float, float]]:
    """The region's shadow on axis i, as merged t-intervals."""
    return _merge(zip(region.lo[:, i].tolist(), region.hi[:, i].tolist())) if region.nbox else []


def _subtract(a: list[tuple[float, float]], b: list[tuple[float, float]]) -> list[tuple[float, float]]:
    out = []
    for lo, hi in a:
        pieces = [(lo, hi)]
        for blo, bhi in b:
            nxt = []
            for plo, phi in pieces:
                if bhi <= plo or blo >= phi:
                    nxt.append((plo, phi))
                    continue
                if blo > plo:
                    nxt.append((plo, blo))
                if bhi < phi:
                    nxt.append((bhi, phi))
            pieces = nxt
        out += [(p, q) for p, q in pieces if q - p > 1e-9]
    return out


def unseen_values(space: Space, test: Region, train: Region) -> dict[str, list[tuple[float, float]]]:
    """Per axis (the class axis too), the t-intervals the test region reaches that no
    training region does."""
    out = {}
    for i, ax in enumerate(space.axes):
        rest = _subtract(projection(test, i), projection(train, i))
        if rest:
            out[ax.name] = rest
    return out


def holdout_kind(space: Space, test: Region, train: Region) -> tuple[str, dict]:
    """The kind of a test split, and the evidence (unseen intervals per axis, overlap share)."""
    if test.is_empty() or train.is_empty():
        return "random", {"shared_mass_fraction": 0.0, "unseen": {}}
    shared = (test & train).mass() / test.mass()
    evidence = {"shared_mass_fraction": shared}
    if shared > 0.99:
        evidence["unseen"] = {}
        return "random", evidence
    unseen = unseen_values(space, test, train)
    evidence["unseen"] = unseen
    if not unseen:
        return "composition", evidence
    if CLASS in unseen:
        return "extrapolation", evidence
    for name, ivs in unseen.items():
        ax = space[name]
        if ax.measure == CIRCULAR and abs(ax.t_span - ax.period) < 1e-9:
            continue  # on a full circle every held-out arc has seen values on both sides
        seen = projection(train, space.index[name])
        lo, hi = seen[0][0], seen[-1][1]
        if any(a < lo - 1e-9 or b > hi + 1e-9 for a, b in ivs):
            return "extrapolation", evidence
    return "interpolation", evidence


def values_text(space: Space, name: str, ivs: list[tuple[float, float]], classes: tuple[str, ...] = ()) -> str:
    """t-intervals of one axis in the spec's terms: class names, levels or value intervals."""
    if name == CLASS and classes:
        idx = sorted({i for lo, hi in ivs for i in range(len(classes)) if lo - 1e-9 <= i <= hi + 1e-9})
        return "class " + ", ".join(classes[i] for i in idx)
    return f"{name} " + " ".join(t_interval_text(space[name], a, b) for a, b in ivs)
