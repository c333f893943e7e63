"""`import augsplit` gives the documented public API: every name resolves, the module
docstring and help() list them, the import itself stays light (names load on first use,
PEP 562), and `python -m augsplit` runs the command line."""

from __future__ import annotations

import os
import pydoc
import subprocess
import sys
from pathlib import Path

import pytest

import augsplit

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}


def test_every_public_name_resolves_and_is_documented():
    assert 15 <= len(augsplit.__all__) <= 25
    for name in augsplit.__all__:
        obj = getattr(augsplit, name)
        assert obj.__doc__, name
        assert name in augsplit.__doc__, name  # the module docstring lists it
    assert set(augsplit.__all__) <= set(dir(augsplit))  # tab completion sees names not yet loaded


def test_help_lists_the_api():
    text = pydoc.render_doc(augsplit, renderer=pydoc.plaintext)
    for name in augsplit.__all__:
        assert name in text, name


def test_unknown_names_raise_attribute_error():
    with pytest.raises(AttributeError, match="no attribute 'nope'"):
        augsplit.nope  # noqa: B018


def test_errors_form_one_family():
    assert issubclass(augsplit.SpecError, augsplit.AugsplitError)
    assert issubclass(augsplit.DatasetError, augsplit.AugsplitError)


def test_import_is_light():
    code = ("import sys, augsplit; heavy = [m for m in ('pandas', 'cv2', 'pyarrow', 'pydantic', 'albumentations', "
            "'matplotlib', 'scipy') if m in sys.modules]; print(heavy)")
    out = subprocess.run([sys.executable, "-c", code], env=ENV, capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_python_dash_m_runs_the_command_line():
    r = subprocess.run([sys.executable, "-m", "augsplit", "--version"], env=ENV, capture_output=True, text=True)
    assert r.returncode == 0 and augsplit.__version__ in r.stdout + r.stderr
    r = subprocess.run([sys.executable, "-m", "augsplit", "plan", str(ROOT / "no-such.yaml")], env=ENV,
                       capture_output=True, text=True)
    assert r.returncode == 2 and "Traceback" not in r.stderr and r.stderr.count("\n") == 1


def test_open_spec_and_builders_work_together():
    plan = augsplit.open_spec("demo").plan
    region = augsplit.box(plan.space, y=(44, 57))
    assert region == plan.split("test_far_lane").region
    assert isinstance(region, augsplit.Region)
