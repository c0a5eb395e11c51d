"""Fixtures of the fits tests; the helpers live in fits_test_helpers.py (imported by name)."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from fits_test_helpers import write_run  # noqa: E402


@pytest.fixture
def make_run(tmp_path):
    def _make(points, name="run", **kw):
        return write_run(tmp_path / name, points, **kw)

    return _make
