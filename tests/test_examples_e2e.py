"""Every shipped example goes plan -> generate -> verify -> audit -> score with exit 0, as a new
user would run it: the built-in demo and every spec in configs/ (a config added later is picked
up by the glob). Perfect predictions score 1.0 on every split.

Reference: the exit-code contract of DESIGN.md (0 success, 1 a finding, 2 bad input); a clean,
guaranteed dataset has no finding, so a CI gate on these examples must be green.
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

from augsplit.cli import main
from augsplit.spec import builtin_spec_path

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = {c.stem: c for c in sorted((ROOT / "configs").glob("*.yaml"))}
EXAMPLES["builtin_demo"] = "demo"


@pytest.mark.parametrize("name", sorted(EXAMPLES))
def test_example_is_green_end_to_end(name, tmp_path, capsys):
    spec = str(EXAMPLES[name])
    out = tmp_path / "data"
    assert main(["plan", spec]) == 0
    assert main(["generate", spec, "--out", str(out), "--store", "parquet", "--workers", "2", "--quiet"]) == 0
    assert main(["verify", str(out)]) == 0
    audit_code = main(["audit", str(out), "--quiet"])
    said = capsys.readouterr().out
    assert audit_code == 0, said
    report = json.loads((out / "audit" / "audit.json").read_text())
    assert report["exit_code"] == 0

    # perfect predictions: every image predicted as its own class
    manifest = pd.read_parquet(out / "manifest", columns=["image_id", "class_name"])
    preds = tmp_path / "preds.csv"
    manifest.rename(columns={"class_name": "predicted"}).to_csv(preds, index=False)
    assert main(["score", str(out), str(preds), "--out", str(tmp_path / "score")]) == 0
    scored = json.loads((tmp_path / "score" / "score.json").read_text())
    accs = [row["accuracy"] for row in scored["by_split"]]
    assert accs and all(a == 1.0 for a in accs), scored["by_split"]


def test_builtin_demo_is_a_config():
    assert builtin_spec_path("demo").read_bytes() == (ROOT / "configs" / "demo_conveyor.yaml").read_bytes()
