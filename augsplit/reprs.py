"""Short reprs that show how an object was made, as scikit-learn's estimators do: the class
name, then the arguments of its constructor that differ from their defaults, each value cut
so the whole stays under MAX_CHARS and on one line."""

from __future__ import annotations

import inspect
from pathlib import PurePath

MAX_CHARS = 300


class Shown(str):
    """A value shown as written (e.g. ``<spec 1a2b...>``), not through repr()."""

    def __repr__(self) -> str:
        return str(self)


def _value(v, width: int) -> str:
    if isinstance(v, PurePath):
        v = str(v)
    text = repr(v)
    if len(text) <= width and "\n" not in text:
        return text
    if isinstance(v, str):  # keep a path's end, where its name is
        return repr("..." + v[-max(width - 5, 8):])
    return f"{type(v).__name__}(...)"


def _defaults(cls) -> dict:
    try:
        params = inspect.signature(cls.__init__).parameters
    except (TypeError, ValueError):
        return {}
    return {n: p.default for n, p in params.items() if p.default is not inspect.Parameter.empty}


def _is_default(v, default) -> bool:
    try:
        return bool(v == default) and type(v) is type(default)
    except Exception:  # noqa: BLE001 - arrays and odd objects: shown, never compared
        return False


def made_repr(obj, args: dict, positional: tuple[str, ...] = ()) -> str:
    """``Name(pos, ..., key=value, ...)`` of `obj` from its constructor arguments `args`: the
    `positional` ones by value, the others only where they differ from the default."""
    defaults = _defaults(type(obj))
    items = [(None if n in positional else n, v) for n, v in args.items()
             if n in positional or n not in defaults or not _is_default(v, defaults[n])]
    name = type(obj).__name__
    for width in (MAX_CHARS, 120, 60, 30, 12):
        parts = [_value(v, width) if k is None else f"{k}={_value(v, width)}" for k, v in items]
        text = f"{name}({', '.join(parts)})"
        if len(text) < MAX_CHARS:
            return text
    return text[:MAX_CHARS - 5] + "...)"


# ---- short reprs and HTML tables of results (plans, audits, scores) ------------------------------

# a verdict's colour in HTML tables: passing, warning, failing words of plans, audits and checks
_GOOD, _WARN, _BAD = ("pass", "proved", "guarded", "declared"), ("warn", "skipped"), ("fail", "refused")
_COLOURS = {**{v: "#d8f0d8" for v in _GOOD}, **{v: "#fbe8c8" for v in _WARN}, **{v: "#f6d0d0" for v in _BAD}}


def cut_names(names, width: int = 80) -> str:
    """`['a', 'b', ... +3]`: a list of names shown within about `width` characters."""
    names = [str(n) for n in names]
    shown: list[str] = []
    for k, n in enumerate(names):
        more = len(names) - k
        if len(", ".join(shown + [repr(n)])) > width and more:
            return "[" + ", ".join(shown + [f"... +{more}"]) + "]"
        shown.append(repr(n))
    return "[" + ", ".join(shown) + "]"


def verdict_table_html(columns, rows, *, verdict_column: str = "verdict", caption: str = "") -> str:
    """An HTML table (every value escaped) whose `verdict_column` cells are coloured by verdict
    (pass / proved green, warn / skipped amber, fail / refused red). `rows` are sequences in
    `columns` order."""
    from html import escape

    columns = [str(c) for c in columns]
    at = columns.index(verdict_column) if verdict_column in columns else -1
    head = "".join(f"<th style='text-align:left;padding:2px 8px'>{escape(c)}</th>" for c in columns)
    body = []
    for r in rows:
        cells = []
        for k, v in enumerate(r):
            text = "" if v is None else str(v)
            colour = _COLOURS.get(text.lower()) if k == at else None
            style = "padding:2px 8px;text-align:left" + (f";background:{colour};font-weight:bold" if colour else "")
            cells.append(f"<td style='{style}'>{escape(text.upper() if colour else text)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    cap = f"<caption style='text-align:left;font-weight:bold'>{escape(caption)}</caption>" if caption else ""
    return f"<table style='border-collapse:collapse'>{cap}<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _short(text: str) -> str:
    return text if len(text) < MAX_CHARS else text[:MAX_CHARS - 5] + "...)"


def _tally(verdicts) -> str:
    counts: dict[str, int] = {}
    for v in verdicts:
        counts[v] = counts.get(v, 0) + 1
    return ", ".join(f"{n} {v}" for v, n in counts.items()) or "none"


def plan_repr(plan) -> str:
    """`Plan(<hash>, classes=2, splits=['train', 'test'], guarantees=1 proved)`, under MAX_CHARS."""
    return _short(f"Plan({plan.hash}, classes={len(plan.classes)}, splits={cut_names([s.name for s in plan.splits])}, "
                  f"guarantees={_tally(v.status for v in plan.verdicts)})")


def plan_html(plan) -> str:
    """A plan in a notebook: its splits and the verdict of every guarantee."""
    from html import escape

    splits = [(s.name, s.role, s.kind, s.total, f"{s.region.mass():.4g}", s.instances) for s in plan.splits]
    verdicts = [(v.kind + (" per class" if v.per_class else ""), " ~ ".join(v.between), v.status, v.message)
                for v in plan.verdicts]
    head = (f"<p><b>Plan</b> {escape(plan.hash)}: canvas {plan.canvas.width}x{plan.canvas.height}, "
            f"{len(plan.classes)} classes, {len(plan.splits)} splits</p>")
    return (head + verdict_table_html(("split", "role", "kind", "images", "mass", "instances"), splits, caption="splits")
            + verdict_table_html(("disjoint", "between", "verdict", "numbers"), verdicts, caption="guarantees"))


def audit_repr(result) -> str:
    """`AuditResult(verdict='fail', checks=9 (6 pass, 3 fail), pairs=[...], skipped=1)`, under MAX_CHARS."""
    pairs = cut_names(["/".join(p) for p in result.pairs], 60)
    return _short(f"AuditResult(verdict={result.verdict!r}, checks={len(result.checks)} "
                  f"({_tally(c.verdict for c in result.checks)}), pairs={pairs}, skipped={len(result.skipped)})")


def audit_html(result) -> str:
    """An audit in a notebook: one row per check (and per skipped check), the overall verdict."""
    from html import escape

    rows = [(c.name, "/".join(c.pair) if c.pair else "-", c.verdict, c.detail) for c in result.checks]
    rows += [(s.name, "/".join(s.pair) if s.pair else "-", "skipped", s.reason) for s in result.skipped]
    head = f"<p><b>Audit</b>: {escape(result.verdict.upper())}, {len(result.checks)} checks</p>"
    return head + verdict_table_html(("check", "pair", "verdict", "detail"), rows)


def score_repr(result) -> str:
    """`ScoreResult('preds.csv', train='train', scored=90/100, splits=[...])`, under MAX_CHARS."""
    splits = cut_names(list(result.by_split["split"]), 80)
    return _short(f"ScoreResult({str(result.predictions)[-60:]!r}, train={result.train_split!r}, "
                  f"scored={result.n_scored}/{result.n_images}, splits={splits})")


def score_html(result) -> str:
    """A score in a notebook: accuracy per split with its interval, then the verdicts."""
    from html import escape

    rows = [(r["split"], int(r["n"]), f"{r['accuracy']:.3f}", f"[{r['ci_lo']:.3f}, {r['ci_hi']:.3f}]",
             f"{r['chance']:.3f}") for _, r in result.by_split.iterrows()]
    head = (f"<p><b>Score</b> {escape(str(result.predictions))}: {result.n_scored}/{result.n_images} images, "
            f"train split {escape(result.train_split)}</p>")
    return (head + verdict_table_html(("split", "n", "accuracy", "interval", "chance"), rows, caption="accuracy")
            + verdict_table_html(("verdict",), [(v,) for v in result.verdicts], verdict_column="", caption="verdicts"))
