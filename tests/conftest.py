"""Fixtures shared by the generation tests: a module states SPEC (and SERIAL, the options of
its reference run); `spec_file` writes SPEC to YAML and `serial` generates it in one process,
the bytes every other way of generating must equal."""

from __future__ import annotations

from pathlib import Path

import pytest
from specs import write_spec

from augsplit.generate import generate


@pytest.fixture(scope="module")
def spec_file(request, tmp_path_factory) -> Path:
    return write_spec(tmp_path_factory.mktemp("spec"), request.module.SPEC)


@pytest.fixture(scope="module")
def serial(request, spec_file, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("serial") / "ds"
    generate(spec_file, out, request.module.SERIAL)
    return out
