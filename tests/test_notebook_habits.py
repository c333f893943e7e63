"""Notebook and shell habits: progress bars through tqdm.auto (a widget in Jupyter), short
reprs (under 300 characters, one line) and HTML reprs showing the verdict table for plans,
audit results and score results, and defaults shown in every subcommand's --help."""

from __future__ import annotations

import argparse
import ast
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from specs import spec_dict, write_spec

import augsplit
from augsplit.audit.result import AuditResult, CheckResult, Skipped
from augsplit.build import open_mapping, open_spec
from augsplit.cli import build_parser
from augsplit.reprs import MAX_CHARS, audit_html, cut_names, score_html, score_repr, verdict_table_html

PACKAGE = Path(augsplit.__file__).parent


def short(obj) -> str:
    text = repr(obj)
    assert len(text) < MAX_CHARS and "\n" not in text, text
    return text


# ---- progress bars --------------------------------------------------------------------------


def test_every_progress_bar_is_tqdm_auto():
    """Only augsplit.progress imports tqdm, and it imports tqdm.auto (checked on the source)."""
    importers = {}
    for path in PACKAGE.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.split(".")[0] == "tqdm":
                importers.setdefault(str(path.relative_to(PACKAGE)), set()).add(node.module)
            elif isinstance(node, ast.Import) and any(a.name.split(".")[0] == "tqdm" for a in node.names):
                importers.setdefault(str(path.relative_to(PACKAGE)), set()).add("tqdm")
    assert importers == {"progress.py": {"tqdm.auto"}}


def test_the_progress_bar_is_the_auto_class():
    from tqdm.auto import tqdm as auto

    from augsplit.progress import bar

    with bar(range(3), disable=True) as b:
        assert isinstance(b, auto) and list(b) == [0, 1, 2]


# ---- --help ---------------------------------------------------------------------------------


def subparsers():
    p = build_parser()
    sub = next(a for a in p._actions if isinstance(a, argparse._SubParsersAction))
    return sub.choices


def test_help_shows_every_default():
    checked = 0
    for name, q in subparsers().items():
        text = " ".join(q.format_help().split())
        for action in q._actions:
            if action.default in (None, False, argparse.SUPPRESS) or not (action.option_strings or action.nargs == "?"):
                continue
            if "%(default)" in (q.formatter_class(q.prog)._get_help_string(action) or ""):
                assert f"(default: {action.default})" in text, (name, action.dest)
            else:  # the help names the default in its own words
                assert "default" in action.help, (name, action.dest)
            checked += 1
    assert checked >= 10  # generate alone has seven
    # options without a default show none (no "(default: None)")
    assert all("default: None" not in " ".join(q.format_help().split()) for q in subparsers().values())


# ---- reprs ----------------------------------------------------------------------------------


def test_plan_repr_is_short_and_its_html_shows_the_verdicts():
    plan = open_spec(str(augsplit.spec.builtin_spec_path("demo"))).plan
    text = short(plan)
    assert text.startswith(f"Plan({plan.hash}, classes={len(plan.classes)}, splits=[")
    html = plan._repr_html_()
    for s in plan.splits:
        assert f"<td style='padding:2px 8px;text-align:left'>{s.name}</td>" in html
    for v in plan.verdicts:
        assert f">{v.status.upper()}</td>" in html
    assert html.count("<tr>") == 2 + len(plan.splits) + len(plan.verdicts)


def test_plan_repr_of_many_splits_stays_short():
    splits = {f"split_number_{k:02d}": {"region": {"x": [k, k + 1]}, "per_class": 1} for k in range(40)}
    plan = open_mapping(spec_dict(splits=splits)).plan
    text = short(plan)
    assert "'split_number_00'" in text and "... +" in text


@pytest.fixture(scope="module")
def audited(tmp_path_factory):
    from augsplit.audit.entry import audit_dataset
    from augsplit.generate import Options, generate

    base = tmp_path_factory.mktemp("habits")
    ds = base / "ds"
    generate(write_spec(base, spec_dict()), ds, Options(store="files", progress=False))
    return ds, audit_dataset(ds)


def test_audit_result_repr_is_short(audited):
    _, result = audited
    text = short(result)
    assert text.startswith(f"AuditResult(verdict={result.verdict!r}, checks={len(result.checks)} (")
    assert "train/test" in text
    html = result._repr_html_()
    for c in result.checks:
        assert c.name in html
    assert html.count("<tr>") == 1 + len(result.checks) + len(result.skipped)


def test_audit_result_of_many_checks_stays_short():
    worst = pd.DataFrame({"a": np.arange(1000)})
    pairs = tuple((f"train_{k}", f"test_far_{k}") for k in range(30))
    checks = tuple(CheckResult(f"check_{k}", ("pass", "warn", "fail")[k % 3], {"n": list(range(100))}, worst,
                               "detail " * 40, pairs[k % 30]) for k in range(90))
    result = AuditResult(checks, pairs, (Skipped("phash", None, "no images <here>"),))
    text = short(result)
    assert "30 pass, 30 warn, 30 fail" in text and "... +" in text and "skipped=1" in text
    html = audit_html(result)
    assert html.count(">FAIL<") == 30 and "no images &lt;here&gt;" in html and "<here>" not in html


def test_verdict_table_html_escapes_and_colours():
    html = verdict_table_html(("name", "verdict"), [("<b>x</b>", "fail"), ("y", "pass"), ("z", "other")])
    assert "&lt;b&gt;x&lt;/b&gt;" in html and "<b>x" not in html
    assert "background:#f6d0d0;font-weight:bold'>FAIL<" in html and "background:#d8f0d8;font-weight:bold'>PASS<" in html
    assert ">other<" in html  # an unknown word is shown as it is, uncoloured


def test_cut_names():
    assert cut_names(["a", "b"]) == "['a', 'b']"
    text = cut_names([f"name{k}" for k in range(100)], 40)
    assert text.endswith("+" + str(100 - text.count("'name") ) + "]") and len(text) < 60


def test_score_repr_and_html(audited):
    from augsplit.dataset import read_manifest
    from augsplit.score import score

    ds, _ = audited
    manifest = read_manifest(ds)
    preds = pd.DataFrame({"image_id": manifest["image_id"], "predicted": manifest["class_name"]})
    result = score(manifest, preds, "train", n_boot=50)
    text = score_repr(result)
    assert len(text) < MAX_CHARS and f"scored={len(manifest)}/{len(manifest)}" in text
    html = score_html(result)
    assert all(v.split(":")[0] in html for v in result.verdicts) and html.count("<tr>") >= 1 + 2 + 1
