"""The README's "Use in training" examples run as written, each on its own (a fresh namespace
per block, as a reader pasting one of them would), import only from `augsplit`, and do what
they say."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SECTION = "## Use in training"
FENCE = re.compile(r"```python\n(.*?)```", re.S)
SHELL = re.compile(r"```bash\n(.*?)```", re.S)


def section(text: str) -> str:
    """The text from the section heading to the next heading of the same level."""
    start = text.find(SECTION)
    if start < 0:
        return ""
    rest = text[start + len(SECTION):]
    end = re.search(r"^## ", rest, re.M)
    return rest[: end.start()] if end else rest


def blocks(path: Path) -> list[str]:
    return FENCE.findall(section(path.read_text(encoding="utf-8")))


def commands(path: Path) -> list[str]:
    """The shell lines of the section's bash blocks."""
    return [ln for b in SHELL.findall(section(path.read_text(encoding="utf-8"))) for ln in b.splitlines()
            if ln.strip() and not ln.lstrip().startswith("#")]


def run_commands(lines: list[str]) -> None:
    """Run each `augsplit ...` line through the CLI's own entry point (in process: no new
    interpreter to start); every one must exit 0."""
    import shlex

    from augsplit.cli import main

    for line in lines:
        argv = shlex.split(line)
        assert argv[0] == "augsplit", f"unexpected command in the docs: {line}"
        assert main(argv[1:] + (["--quiet"] if argv[1] == "audit" else [])) == 0, line


def run(code_blocks: list[str], where: Path, capsys) -> str:
    for k, code in enumerate(code_blocks):
        ns: dict = {"__name__": "__readme__"}
        exec(compile(code, f"<{where.name} block {k + 1}>", "exec"), ns)  # noqa: S102 - our own docs
    return capsys.readouterr().out


def augsplit_imports(code: str) -> list[str]:
    """The augsplit modules a block imports from."""
    import ast

    out = []
    for node in ast.walk(ast.parse(code)):
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("augsplit"):
            out.append(node.module)
        elif isinstance(node, ast.Import):
            out += [a.name for a in node.names if a.name.startswith("augsplit")]
    return out


def check(out: str) -> None:
    # what the examples claim, checked on what they printed
    assert "300 far-lane predictions" in out
    assert "(128, 128, 3)" in out
    assert "201 training draws, 0 in the held-out region" in out
    # the regions example: the Python box is the spec's region; reprs say how regions were made
    assert "True\nSplitPlan('test_far_lane', role=test, kind=extrapolation, images=300, region=box(y=(44, 57))" in out
    assert "Region(box(y=(44, 57)) | by_class({'P4-00': box(x=(10, 24))}); 2 boxes" in out
    assert out.rstrip().endswith("True\nFalse")


def test_readme_examples_run(tmp_path, monkeypatch, capsys):
    pytest.importorskip("torch")
    doc = ROOT / "README.md"
    code = blocks(doc)
    assert len(code) == 4
    assert all(set(augsplit_imports(c)) == {"augsplit"} for c in code)  # only the public API
    monkeypatch.chdir(tmp_path)
    out = run(code, doc, capsys)
    check(out)
    assert commands(doc) == ["augsplit audit photo-draws --spec belt.yaml --out photo-audit"]
    run_commands(commands(doc))  # the audit of the example's log passes (exit 0), footprints included
    import json

    report = json.loads((tmp_path / "photo-audit" / "audit.json").read_text())
    assert "footprint_overlap" in json.dumps(report)
    # the sampler's log holds every item of both epochs, each once, from the worker processes
    from augsplit.paramlog import read_log

    draws = read_log(tmp_path / "draws")
    assert len(draws) == 1024 and set(draws["worker"]) == {0, 1}
    assert sorted(zip(draws["epoch"], draws["item"])) == [(e, i) for e in (0, 1) for i in range(512)]
