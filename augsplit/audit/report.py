"""Render an AuditResult: a terminal table, audit.json and a self-contained HTML page.
Reports compute nothing; every number and picture comes from the result objects.

audit.json (schema "augsplit.audit/1"; keys are stable, new keys may be added):

    schema        "augsplit.audit/1"
    verdict       "pass" | "warn" | "fail"  (worst over all checks)
    exit_code     0 when no check failed, 1 otherwise
    pairs         [[split_a, split_b], ...]  (a is the training side)
    inputs        source, n_rows, rows_per_split{split: n}, axes{name: {lo, hi, periodic, log}},
                  notes[], canvas [H, W] | null, images ("loader"|"file"|"bytes"|"hash_column"|"none")
    checks[]      name, pair [a, b] | null, key ("name" or "name:a/b"), verdict, detail,
                  numbers{...}, worst[{column: value}] (worst offenders, worst first)
    skipped[]     name, pair, reason

    numbers per check name:
    finite_values        n_rows_checked, n_bad_rows, per_column{col: n}, bad_rows[] (first 1000)
    declared_regions     from a spec: joint_overlap_mass, mass_a, mass_b,
                         per_axis{axis: {overlap_fraction_of_axis}}, n_a_outside_own_region,
                         n_a_inside_other_region, n_b_outside_own_region, n_b_inside_other_region;
                         from the data: source "data", bounding_boxes_intersect,
                         per_axis{axis: {range_a, range_b, overlap_fraction_of_axis, overlap}}
    parameter_proximity  axes[], metric, margin, same_class, distance{n, min, p01, p05, median,
                         mean}, distance_any_class{...}, n_below_margin, fraction_below_margin
                         (with a margin) or n_identical_parameters (without), per_class{class:
                         {n, min, p01, p05, median, mean, n_below_margin}}
    footprint_overlap    canvas [H, W], n_train, n_test, n_overlapping, fraction_overlapping,
                         shared_px_total, shared_px_max, shared_canvas_px, claim, max_fraction,
                         n_masks, per_class{class: {n_test, n_overlapping, fraction_overlapping,
                         shared_px_max, train_covered_px}}
    near_duplicates      method ("render"|"pixels"|"hash"|"radius"), n_test, n_train,
                         radius_bits, n_near_duplicates, fraction_near_duplicates,
                         n_exact_duplicates, n_candidates, n_leaks, n_lookalikes,
                         n_identical_by_design, n_ambiguous, min_distance_bits,
                         distance_histogram[radius+1], substrings, per_class{class: {n_test,
                         n_near_duplicates, n_exact_duplicates, n_leaks}}; render: n_test_changed,
                         copy_ratio; pixels: null{n, min, p01, p05, median}, threshold; hash:
                         null{...}, threshold_bits. worst[] rows carry leak and the evidence
                         (own, design, cross: grey levels; or delta)
    row_integrity        (with masks) n_rows_checked, n_bad_rows; worst[] row, split, id, reason
    instance_leakage     n_unseen_instances, n_test_rows_unseen, n_leaked_instances,
                         n_leaked_test_rows, n_train_rows_flagged_unseen, leaked[{class, instance}]
    category_overlap     footprint ("bbox"|"mask"), n_same_pairs, n_diff_pairs,
                         mean_iou_same_class_across, mean_iou_diff_class_within, ratio, max_ratio
    log_regions          (parameter logs against a spec) rows, rows_outside_own_region,
                         train_rows_inside_held_out_regions, unknown_splits[]

Distances are in normalised units (each axis divided by its range; circular axes the short
way round). Non-finite numbers are written as null.
"""

from __future__ import annotations

import html
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from .. import figures
from ..io import is_stdout, plain, write_output
from .result import AuditResult, CheckResult

SCHEMA = "augsplit.audit/1"
_HEADLINE = {  # the one number the terminal table shows per check
    "finite_values": ("n_bad_rows", "bad rows"),
    "declared_regions": ("joint_overlap_mass", "joint overlap"),
    "parameter_proximity": (("distance", "min"), "min distance"),
    "footprint_overlap": ("fraction_overlapping", "overlapping"),
    "near_duplicates": ("n_leaks", "copies"),
    "row_integrity": ("n_bad_rows", "bad rows"),
    "instance_leakage": ("n_leaked_instances", "leaked"),
    "category_overlap": ("ratio", "IoU ratio"),
}


# ---- JSON ---------------------------------------------------------------------------------

def _check_dict(c: CheckResult) -> dict:
    worst = [] if c.worst is None else [plain(r) for r in c.worst.to_dict(orient="records")]
    return {"name": c.name, "pair": list(c.pair) if c.pair else None, "key": c.key, "verdict": c.verdict,
            "detail": c.detail, "numbers": plain(c.numbers), "worst": worst}


def to_json(result: AuditResult) -> dict:
    """The audit as a JSON-ready dict (the content of audit.json)."""
    return {
        "schema": SCHEMA,
        "verdict": result.verdict,
        "exit_code": result.exit_code,
        "pairs": [list(p) for p in result.pairs],
        "inputs": plain(result.inputs),
        "checks": [_check_dict(c) for c in result.checks],
        "skipped": [{"name": s.name, "pair": list(s.pair) if s.pair else None, "reason": s.reason} for s in result.skipped],
    }


def json_text(result: AuditResult) -> str:
    """audit.json's text."""
    return json.dumps(to_json(result), indent=2, allow_nan=False)


def write_json(result: AuditResult, path) -> Path | str:
    """audit.json at `path` (written safely, see augsplit.io), or on standard output for "-"."""
    text = json_text(result)
    return write_output(path, text + "\n" if is_stdout(path) else text)


# ---- terminal -----------------------------------------------------------------------------

def _headline(c: CheckResult) -> str:
    key, label = _HEADLINE.get(c.name, (None, ""))
    v = c.numbers
    for k in key if isinstance(key, tuple) else (key,):
        v = v.get(k) if isinstance(v, dict) else None
    if v is None:
        return ""
    if isinstance(v, float):
        v = f"{v:.2%}" if c.name == "footprint_overlap" else f"{v:.4g}"
    return f"{label} {v}"


def summary_table(result: AuditResult) -> str:
    """A plain-text table: one line per check, then skipped checks, then the overall verdict."""
    rows = [("check", "pair", "verdict", "figure", "detail")]
    for c in result.checks:
        rows.append((c.name, "/".join(c.pair) if c.pair else "-", c.verdict.upper(), _headline(c), c.detail))
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    lines = []
    for k, r in enumerate(rows):
        detail = r[4] if len(r[4]) <= 100 else r[4][:97] + "..."
        lines.append("  ".join(r[i].ljust(widths[i]) for i in range(4)) + "  " + detail)
        if k == 0:
            lines.append("  ".join("-" * w for w in widths) + "  " + "-" * 6)
    for s in result.skipped:
        lines.append(f"skipped {s.name} ({'/'.join(s.pair) if s.pair else '-'}): {s.reason}")
    n_fail = len(result.failed())
    skipped = sorted({s.name for s in result.skipped})
    lines.append(f"audit {result.verdict.upper()}: {len(result.checks)} checks, {n_fail} failed, "
                 f"{sum(c.verdict == 'warn' for c in result.checks)} warnings, {len(result.skipped)} skipped"
                 + (f" (not run: {', '.join(skipped)}; see above)" if skipped else ""))
    return "\n".join(lines)


# ---- HTML ---------------------------------------------------------------------------------

def _figure(w=4.0, h=3.0):
    return figures.figure(figsize=(w, h), dpi=100)


def _png(fig) -> str:
    return figures.img_tag(fig, bbox_inches="tight")


def _coverage_plot(c: CheckResult) -> str:
    a = c.arrays
    fig = _figure(9, 3)
    for k, (key, title) in enumerate((("train_coverage", f"{c.pair[0]} coverage" if c.pair else "train"),
                                      ("test_coverage", f"{c.pair[1]} coverage" if c.pair else "test"),
                                      ("shared_map", "shared same-class pixels"))):
        ax = fig.add_subplot(1, 3, k + 1)
        m = a[key]
        im = ax.imshow(np.log1p(m) if key != "shared_map" else m, cmap="magma" if key != "shared_map" else "Reds",
                       interpolation="nearest")
        ax.set_title(title, fontsize=9); ax.set_xticks([]); ax.set_yticks([])
        if key != "shared_map":
            fig.colorbar(im, ax=ax, fraction=0.046, label="log(1 + objects)")
    return _png(fig)


def _distance_plot(c: CheckResult) -> str:
    a = c.arrays
    fig = _figure(5, 3)
    ax = fig.add_subplot(1, 1, 1)
    edges, hist = a["distance_edges"], a["distance_hist"]
    ax.bar(edges[:-1], hist, width=np.diff(edges), align="edge", color="#4477aa")
    if a.get("margin") is not None:
        ax.axvline(a["margin"], color="#cc3311", ls="--", label=f"margin {a['margin']:g}")
        ax.legend(fontsize=8)
    ax.set_xlabel("distance to nearest train row (normalised)"); ax.set_ylabel("test rows")
    return _png(fig)


def _hash_plot(c: CheckResult) -> str:
    hist = c.arrays["distance_histogram"]
    fig = _figure(4, 2.6)
    ax = fig.add_subplot(1, 1, 1)
    ax.bar(np.arange(len(hist)), hist, color="#cc6677")
    ax.set_xlabel("Hamming distance to nearest train image (bits)"); ax.set_ylabel("test images")
    return _png(fig)


def _axis_plots(result: AuditResult) -> str:
    hists = result.arrays.get("axis_hist") or {}
    if not hists:
        return ""
    n = len(hists)
    fig = _figure(3.2 * min(n, 3), 2.4 * math.ceil(n / 3))
    for k, (name, h) in enumerate(hists.items()):
        ax = fig.add_subplot(math.ceil(n / 3), min(n, 3), k + 1)
        edges = np.asarray(h["edges"])
        for split, counts in h["counts"].items():
            ax.stairs(counts, edges, label=str(split), fill=False)
        ax.set_title(name, fontsize=9)
    fig.tight_layout(rect=(0, 0, 1, 0.9))
    handles, labels = fig.axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="upper center", ncol=min(len(labels), 6), fontsize=8, frameon=False)
    return _png(fig)


def _thumbs(c: CheckResult) -> str:
    thumbs = c.arrays.get("thumbs") or []
    if not thumbs:
        return ""
    fig = _figure(2.0 * len(thumbs), 4.2)
    for k, (caption, test_img, train_img) in enumerate(thumbs):
        for row, img in enumerate((test_img, train_img)):
            ax = fig.add_subplot(2, len(thumbs), row * len(thumbs) + k + 1)
            ax.set_xticks([]); ax.set_yticks([])
            if img is not None:
                ax.imshow(img, cmap="gray" if np.ndim(img) == 2 else None, interpolation="nearest")
            ax.set_title(("test " if row == 0 else "train ") + caption.split(" / ")[row].split(" ", 1)[1], fontsize=7)
    return "<p>Worst offenders (top) beside their nearest train images (bottom)</p>" + _png(fig)


def _table(df: pd.DataFrame | None) -> str:
    if df is None or len(df) == 0:
        return ""
    return df.to_html(index=False, border=0, classes="worst", float_format=lambda v: f"{v:.4g}")


def write_html(result: AuditResult, path) -> Path:
    """audit.html at `path` (written safely, see augsplit.io)."""
    return write_output(path, html_text(result))


def html_text(result: AuditResult) -> str:
    """audit.html's text: a single self-contained page (plots embedded as base64 PNG)."""
    parts = [f"<h1>augsplit audit: {result.verdict.upper()}</h1>",
             f"<p>{html.escape(str(result.inputs.get('n_rows')))} rows; pairs: "
             + ", ".join(html.escape(f"{a} vs {b}") for a, b in result.pairs) + "</p>",
             "<table class='sum'><tr><th>check</th><th>pair</th><th>verdict</th><th>figure</th><th>detail</th></tr>"]
    for c in result.checks:
        parts.append(f"<tr class='{c.verdict}'><td><a href='#{html.escape(c.key)}'>{c.name}</a></td>"
                     f"<td>{html.escape('/'.join(c.pair) if c.pair else '-')}</td><td>{c.verdict}</td>"
                     f"<td>{html.escape(_headline(c))}</td><td>{html.escape(c.detail)}</td></tr>")
    parts.append("</table>")
    if result.skipped:
        parts.append("<h3>Skipped</h3><ul>" + "".join(
            f"<li>{html.escape(s.name)} ({html.escape('/'.join(s.pair) if s.pair else '-')}): {html.escape(s.reason)}</li>"
            for s in result.skipped) + "</ul>")
    axis = _axis_plots(result)
    if axis:
        parts.append("<h2>Parameters by split</h2>" + axis)
    for c in result.checks:
        parts.append(f"<h2 id='{html.escape(c.key)}'>{c.name} {html.escape('(' + ' vs '.join(c.pair) + ')' if c.pair else '')}"
                     f" <span class='{c.verdict}'>{c.verdict}</span></h2><p>{html.escape(c.detail)}</p>")
        if c.name == "footprint_overlap" and "train_coverage" in c.arrays:
            parts.append(_coverage_plot(c))
        if c.name == "parameter_proximity" and "distance_hist" in c.arrays:
            parts.append(_distance_plot(c))
        if c.name == "near_duplicates" and "distance_histogram" in c.arrays:
            parts.append(_hash_plot(c))
        parts.append(_thumbs(c))
        parts.append(_table(c.worst))
        parts.append("<details><summary>numbers</summary><pre>"
                     + html.escape(json.dumps(plain(c.numbers), indent=1)) + "</pre></details>")
    style = ("body{font-family:sans-serif;margin:2em;max-width:1100px} td,th{padding:2px 8px;text-align:left}"
             " .pass{color:#227733} .warn{color:#aa7700} .fail{color:#bb2222;font-weight:bold}"
             " table.worst{font-size:12px} img{max-width:100%}")
    return (f"<!DOCTYPE html><html><head><meta charset='utf-8'><title>augsplit audit</title>"
            f"<style>{style}</style></head><body>{''.join(parts)}</body></html>")


REPORT_FILES = ("audit.json", "audit.html")


def write_reports(result: AuditResult, out_dir, inputs=()) -> dict[str, Path]:
    """audit.json and audit.html in `out_dir` (made if missing; its parent must exist; what may
    be replaced there: augsplit.report_folder; `inputs`, the audited files, never are). For
    "-", audit.json goes to standard output and no HTML is written."""
    from ..report_folder import report_set

    if is_stdout(out_dir):
        return {"json": write_json(result, out_dir)}
    with report_set(out_dir, "audit", REPORT_FILES, inputs) as out:
        return {"json": out.write("audit.json", json_text(result)), "html": out.write("audit.html", html_text(result))}
