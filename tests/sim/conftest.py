"""Fixtures shared by the simulated-bench tests: one pyvisa-py manager and one demo bench per module."""

from __future__ import annotations

import pytest
import pyvisa

from instruments.clock import VirtualClock
from instruments.sim import SimBench
from benchkit.commands.sim import demo_bench


@pytest.fixture(scope="module")
def rm():
    manager = pyvisa.ResourceManager("@py")
    yield manager
    manager.close()


@pytest.fixture(scope="module")
def bench():
    with demo_bench(clock=VirtualClock()) as b:
        yield b
