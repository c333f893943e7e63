"""Score reports: the terminal table, score.json, one CSV per table and a self-contained HTML
page; and two results laid side by side.
"""

from __future__ import annotations

import html
import json
from pathlib import Path

import pandas as pd

from augsplit.errors import DatasetError
from augsplit.io import is_stdout, plain, write_output

from .distance import of_class
from .plots import img_tag, plot_distance, plot_splits, plot_values
from .result import ScoreResult, records
from .statistics import CONFIDENCE
from .tables import compare_rows


def compare(a: ScoreResult, b: ScoreResult, labels: tuple[str, str] = ("a", "b"),
            confidence: float = CONFIDENCE) -> pd.DataFrame:
    """Side-by-side accuracy per split of two prediction files on the same images.

    The paired difference is tested with the exact McNemar test (McNemar, 1947): a binomial
    test of the discordant pairs, from scipy.stats.binomtest.
    """
    if a.dataset != b.dataset and set(a.rows["image_id"]) != set(b.rows["image_id"]):
        raise DatasetError("the two prediction files score different datasets", where=b.predictions)
    return compare_rows(a.rows, b.rows, list(a.by_split["split"]), labels)


# ---- text ------------------------------------------------------------------------------------


def fixed_width(cols, body) -> list[str]:
    w = [max(len(c), *(len(r[i]) for r in body)) if body else len(c) for i, c in enumerate(cols)]
    fmt = lambda r: "  " + "  ".join(v.ljust(w[i]) for i, v in enumerate(r))  # noqa: E731
    return [fmt(cols)] + [fmt(r) for r in body]


def _split_lines(result: ScoreResult) -> list[str]:
    cal = "ece" in result.by_split.columns
    cols = ["split", "n", "accuracy", "interval", "chance"] + [f"top{k}" for k in result.topk] + (["ECE"] if cal else [])
    body = []
    for _, r in result.by_split.iterrows():
        body.append([r["split"], str(r["n"]), f"{r['accuracy']:.3f}", f"[{r['ci_lo']:.3f}, {r['ci_hi']:.3f}]",
                     f"{r['chance']:.3f}"] + [f"{r[f'top{k}']:.3f}" for k in result.topk]
                    + ([f"{r['ece']:.3f}"] if cal else []))
    return fixed_width(cols, body)


def _distance_lines(result: ScoreResult) -> list[str]:
    if not len(result.distance):
        return []
    lines = [f"accuracy against distance from the training region, to the nearest training image of "
             f"{of_class(result.distance_reference)} (axes a split lies beyond):"]
    shown = result.distance[result.distance["held_out_along"]]
    body = [[r["axis"], r["split"], f"{r['lo']:.3g}-{r['hi']:.3g} {r['unit']}", str(r["n"]),
             f"{r['accuracy']:.3f}", f"[{r['ci_lo']:.3f}, {r['ci_hi']:.3f}]"] for _, r in shown.iterrows()]
    lines += fixed_width(["axis", "split", "distance", "n", "accuracy", "interval"], body)
    hidden = sorted(set(result.distance["axis"]) - set(shown["axis"]))
    if hidden:
        lines.append(f"  (no split lies beyond the training images of {of_class(result.distance_reference)} on "
                     f"{', '.join(hidden)}; see distance.csv)")
    return lines


def format_table(result: ScoreResult, label: str | None = None) -> str:
    """The terminal report: accuracy per split, the gaps, and the verdicts."""
    head = f"{label}: " if label else ""
    lines = [f"{head}{result.predictions}  ({result.n_scored}/{result.n_images} images, "
             f"{len(result.classes)} classes, {result.confidence:.0%} Wilson intervals)"]
    lines += _split_lines(result) + _distance_lines(result)
    lines += [f"  {v}" for v in result.verdicts]
    lines += [f"  note: {n}" for n in result.notes]
    return "\n".join(lines)


def compare_table_text(results) -> str:
    (la, a), (lb, b) = results[:2]
    t = compare(a, b, (la, lb))
    cols = ["split", "n", la, lb, "difference", "McNemar p"]
    body = [[r["split"], str(r["n"]), f"{r[f'accuracy_{la}']:.3f}", f"{r[f'accuracy_{lb}']:.3f}",
             f"{r['difference']:+.3f}", f"{r['mcnemar_p']:.3g}"] for _, r in t.iterrows()]
    return "\n".join(["side by side:"] + fixed_width(cols, body))


# ---- files -----------------------------------------------------------------------------------


REPORT_FILES = ("score.json", "report.html")  # besides one CSV per table


def report_names(labels) -> list[str]:
    """Every file a score of the predictions labelled `labels` writes (known before scoring, so
    a report folder is judged before the work): REPORT_FILES, one CSV per table (prefixed by
    label when there are several) and, for two, comparison.csv."""
    several = len(labels) > 1
    tables = [f"{label}_{t}.csv" if several else f"{t}.csv" for label in labels for t in ScoreResult.TABLES]
    return [*REPORT_FILES, *tables, *(["comparison.csv"] if several else [])]


def write_outputs(results: list[tuple[str, ScoreResult]], out_dir, *, title: str = "augsplit score",
                  intro_html: str = "", inputs=()) -> dict[str, Path]:
    """Write score.json, one CSV per table (prefixed by label when several), and report.html.
    `out_dir` "-" prints score.json to standard output and writes nothing else. What may be
    replaced and removed in `out_dir`: augsplit.report_folder; `inputs` (the predictions) never are."""
    from ..report_folder import report_set

    several = len(results) > 1
    doc = {label: r.to_json() for label, r in results} if several else results[0][1].to_json()
    side = compare(results[0][1], results[1][1], (results[0][0], results[1][0])) if several else None
    if several:
        doc = {"models": doc, "comparison": records(side)}
    text = json.dumps(plain(doc), indent=2, allow_nan=False)
    if is_stdout(out_dir):
        return {"score.json": write_output(out_dir, text + "\n")}
    tables = [t for _label, r in results for t in r.tables().values()] + ([side] if several else [])
    csvs = [n for n in report_names([label for label, _r in results]) if n not in REPORT_FILES]
    docs = {"score.json": text, **{name: t.to_csv(index=False) for name, t in zip(csvs, tables, strict=True)},
            "report.html": render_html(results, title=title, intro_html=intro_html)}
    with report_set(out_dir, "score", docs, inputs) as out:
        return {name: out.write(name, data) for name, data in docs.items()}


# ---- HTML ------------------------------------------------------------------------------------


PAGE_STYLE = ("body{font-family:sans-serif;max-width:1100px;margin:auto;padding:1em}"
              "table{border-collapse:collapse;font-size:13px}td,th{border:1px solid #ccc;padding:2px 6px}"
              "img{max-width:100%}.verdict{font-family:monospace}")
DISTANCE_TEXT = ("<p>Each held-out image's distance to the nearest training image of {ref} on that axis "
                 "(position: centre to centre; scale: octaves; angle and hue: degrees the short way round), "
                 "in equal-count bins; the marker at 0 is the reference split; dashed: chance. Axes along "
                 "which no split lies beyond the training images are in the distance table only.</p>")


def html_page(title: str, body: list[str]) -> str:
    """A self-contained HTML page (plots are embedded PNGs) around the given body parts."""
    esc = html.escape
    return "\n".join([f"<!doctype html><html><head><meta charset='utf-8'><title>{esc(title)}</title>",
                      f"<style>{PAGE_STYLE}</style></head><body>", f"<h1>{esc(title)}</h1>", *body,
                      "</body></html>"])


def render_html(results: list[tuple[str, ScoreResult]], *, title: str = "augsplit score", intro_html: str = "") -> str:
    """One self-contained page: verdicts, split accuracies, curves against distance and value."""
    return html_page(title, [intro_html, *render_sections(results)])


def _verdict_parts(results, h: str) -> list[str]:
    esc = html.escape
    parts = []
    for label, r in results:
        parts.append(f"<{h}>Verdict: {esc(label)}</{h}><p>predictions <code>{esc(r.predictions)}</code>, "
                     f"{r.n_scored}/{r.n_images} images scored</p><ul>")
        parts += [f"<li class='verdict'>{esc(v)}</li>" for v in r.verdicts]
        parts += [f"<li><i>note: {esc(n)}</i></li>" for n in r.notes]
        parts.append("</ul>")
    return parts


def _table_parts(results, h: str) -> list[str]:
    parts = []
    for label, r in results:
        parts.append(f"<{h}>Tables: {html.escape(label)}</{h}>")
        for name in ("by_split", "gaps", "by_class", "by_cell", "distance"):
            t = r.tables()[name]
            parts.append(f"<details{' open' if name in ('by_split', 'gaps') else ''}><summary>{name}</summary>"
                         + t.to_html(index=False, float_format=lambda v: f"{v:.4g}") + "</details>")
    return parts


def render_sections(results: list[tuple[str, ScoreResult]], level: int = 2) -> list[str]:
    """The body of a score report for one or two prediction files, as HTML fragments."""
    esc = html.escape
    h = f"h{level}"
    first = results[0][1]
    parts = [f"<p>Dataset: <code>{esc(first.dataset)}</code>; training split <b>{esc(first.train_split)}</b>, "
             f"reference <b>{esc(first.reference_split)}</b>; distances to the nearest training image of "
             f"<b>{esc(of_class(first.distance_reference))}</b>; {first.confidence:.0%} Wilson score intervals; "
             f"gap intervals from {first.n_boot} bootstrap resamples (seed {first.seed}).</p>"]
    parts += _verdict_parts(results, h)
    if len(results) > 1:
        parts.append(f"<{h}>Side by side</{h}>")
        parts.append(compare(results[0][1], results[1][1], (results[0][0], results[1][0])).to_html(
            index=False, float_format=lambda v: f"{v:.3f}"))
    parts.append(f"<{h}>Accuracy per split</{h}>" + img_tag(plot_splits(results)))
    if any(len(r.distance) for _, r in results):
        parts.append(f"<{h}>Accuracy against distance from the training region</{h}>"
                     + DISTANCE_TEXT.format(ref=esc(of_class(first.distance_reference))) + img_tag(plot_distance(results)))
    if any(len(r.by_value) for _, r in results):
        parts.append(f"<{h}>Accuracy against each axis value</{h}><p>Shaded: where the training images lie.</p>"
                     + img_tag(plot_values(results)))
    return parts + _table_parts(results, h)
