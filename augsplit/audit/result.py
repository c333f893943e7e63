"""Value objects every audit check returns, and the verdict algebra that combines them.

A check computes; a report only renders. So everything a report shows (numbers, worst
rows, ready-to-plot arrays such as coverage maps and histograms) lives in these objects.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

PASS, WARN, FAIL = "pass", "warn", "fail"
VERDICTS = (PASS, WARN, FAIL)
_RANK = {PASS: 0, WARN: 1, FAIL: 2}


def worst_verdict(verdicts) -> str:
    """The most severe of some verdicts (pass < warn < fail); pass when there are none."""
    out = PASS
    for v in verdicts:
        if _RANK[v] > _RANK[out]:
            out = v
    return out


@dataclass(frozen=True, eq=False)
class CheckResult:
    """One check on one pair of splits (or on the whole table when `pair` is None).

    `numbers` holds every figure (JSON-ready scalars, lists and nested dicts such as
    `per_class`); `worst` the offending rows, worst first; `arrays` ready-to-plot data for
    the HTML report (coverage maps, histogram counts, thumbnails), never written to JSON.
    """

    name: str
    verdict: str
    numbers: dict
    worst: pd.DataFrame | None
    detail: str
    pair: tuple[str, str] | None = None
    arrays: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.verdict not in VERDICTS:
            raise ValueError(f"verdict must be one of {VERDICTS}, got {self.verdict!r}")

    @property
    def key(self) -> str:
        """Stable identifier: `name` or `name:train/test`."""
        return self.name if self.pair is None else f"{self.name}:{self.pair[0]}/{self.pair[1]}"


@dataclass(frozen=True)
class Skipped:
    """A check that could not run on some input, and why (shown in every report)."""

    name: str
    pair: tuple[str, str] | None
    reason: str


@dataclass(frozen=True, eq=False)
class AuditResult:
    """All checks of one audit run, the pairs audited, what was skipped, and input facts."""

    checks: tuple[CheckResult, ...]
    pairs: tuple[tuple[str, str], ...]
    skipped: tuple[Skipped, ...] = ()
    inputs: dict = field(default_factory=dict)
    arrays: dict = field(default_factory=dict)  # table-wide plot data (per-axis histograms)

    @property
    def verdict(self) -> str:
        return worst_verdict(c.verdict for c in self.checks)

    @property
    def exit_code(self) -> int:
        """0 when nothing failed (warnings allowed), 1 when any check failed."""
        return 1 if self.verdict == FAIL else 0

    def get(self, name: str, pair: tuple[str, str] | None = None) -> CheckResult:
        """The result of check `name` (for `pair` when given); KeyError when absent."""
        for c in self.checks:
            if c.name == name and (pair is None or c.pair == tuple(pair)):
                return c
        raise KeyError(f"no check {name!r}" + (f" for {pair}" if pair else ""))

    def failed(self) -> list[CheckResult]:
        return [c for c in self.checks if c.verdict == FAIL]

    def __repr__(self) -> str:
        from ..reprs import audit_repr

        return audit_repr(self)

    def _repr_html_(self) -> str:
        from ..reprs import audit_html

        return audit_html(self)


def merge_arrays(parts: list[dict]) -> dict:
    """Table-wide plot data of several runs over one table (one run per audited pair): the
    per-axis histograms share their edges, so their per-split counts are united."""
    out: dict = {}
    for arrays in parts:
        for key, value in arrays.items():
            if key == "axis_hist" and key in out:
                for axis, h in value.items():
                    if axis in out[key]:
                        out[key][axis] = {**out[key][axis], "counts": {**out[key][axis]["counts"], **h["counts"]}}
                    else:
                        out[key][axis] = h
            elif key == "axis_hist":
                out[key] = dict(value)
            else:
                out.setdefault(key, value)
    return out


def top_rows(frame: pd.DataFrame, by: str, k: int, ascending: bool) -> pd.DataFrame:
    """The k worst rows by one column, ties broken by row order so output is stable."""
    if len(frame) == 0:
        return frame.reset_index(drop=True)
    order = np.lexsort((np.arange(len(frame)), frame[by].to_numpy() if ascending else -frame[by].to_numpy()))
    return frame.iloc[order[:k]].reset_index(drop=True)


def ids_at(ids: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """ids[idx] as an object array, None where idx is -1 (no match)."""
    idx = np.asarray(idx, dtype=np.int64)
    out = np.empty(len(idx), dtype=object)
    ok = idx >= 0
    if ok.any():
        out[ok] = np.asarray(ids, dtype=object)[idx[ok]]
    return out
