"""Imports flow downward: no reader imports the generator, and the dataset package imports
nothing above it. Checked on the source with `ast`, so a lazy import inside a function counts."""

from __future__ import annotations

import ast
from pathlib import Path

import augsplit

PACKAGE = Path(augsplit.__file__).parent


def module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = rel.parts[:-1] if rel.name == "__init__" else rel.parts
    return ".".join(parts)


def imports_of(path: Path) -> set[str]:
    """Absolute names of the augsplit modules a file imports (relative imports resolved)."""
    name = module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("augsplit")}
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            if mod.startswith("augsplit"):
                out.add(mod)
                out |= {f"{mod}.{a.name}" for a in node.names}  # `from . import generate`
    return out


MODULES = {module_name(p): imports_of(p) for p in PACKAGE.rglob("*.py")}


def test_the_walk_sees_the_package():
    assert "augsplit.dataset.folder" in MODULES and "augsplit.generate" in MODULES
    assert "augsplit.generate" in MODULES["augsplit.cli"]  # the walker finds a lazy import


def test_only_the_command_line_imports_the_generator():
    # the command line and the public API (augsplit.api, the top layer with cli.py) only
    importers = sorted(m for m, deps in MODULES.items() if "augsplit.generate" in deps)
    assert importers == ["augsplit.api", "augsplit.cli"]


def test_the_dataset_package_imports_nothing_above_it():
    above = ("augsplit.generate", "augsplit.verify", "augsplit.preview", "augsplit.data", "augsplit.score",
             "augsplit.audit", "augsplit.cli", "augsplit.albu", "augsplit.executors", "augsplit.formats")
    for m, deps in MODULES.items():
        if m.startswith("augsplit.dataset"):
            bad = sorted(d for d in deps if any(d == a or d.startswith(a + ".") for a in above))
            assert not bad, f"{m} imports {bad}"
