"""Every example spec in configs/ generates a dataset that `augsplit verify` passes, and the
built-in demo spec is the conveyor config (one file, reached two ways)."""

from __future__ import annotations

from pathlib import Path

import pytest

from augsplit.cli import main
from augsplit.spec import builtin_spec_path

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = sorted((ROOT / "configs").glob("*.yaml"))


@pytest.mark.parametrize("config", CONFIGS, ids=[c.stem for c in CONFIGS])
def test_config_generates_a_verified_dataset(config, tmp_path, capsys):
    out = tmp_path / "data"
    assert main(["generate", str(config), "--out", str(out), "--store", "parquet", "--workers", "2", "--quiet"]) == 0
    assert main(["verify", str(out)]) == 0
    said = capsys.readouterr().out
    assert "OK" in said and "re-rendered identically" in said


def test_demo_config_is_the_builtin_demo():
    assert (ROOT / "configs" / "demo_conveyor.yaml").resolve().read_bytes() == builtin_spec_path("demo").read_bytes()
