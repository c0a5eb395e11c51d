"""Fixtures of the sweep tests; the helpers live in sweep_helpers.py (imported by name)."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from sweep_helpers import start_benchkit, stop_benchkit, wait_for  # noqa: E402


@pytest.fixture
def sim_process(tmp_path):
    """`benchkit sim` as its own process (real clock), with its bench file; stopped afterwards."""
    bench_file = tmp_path / "bench.toml"
    proc = start_benchkit("sim", "--bench-file", str(bench_file))
    try:
        wait_for(bench_file.exists, 30, "the bench file of benchkit sim", proc)
        yield bench_file
    finally:
        stop_benchkit(proc)


