"""Helpers for the impedance-against-frequency tests: simulated parts read through a fixture."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from instruments.clock import VirtualClock

# 20+ frequencies from 100 Hz to 10 MHz, 5 per decade (the range)
FREQS_HZ = np.logspace(2, 7, 26)


@pytest.fixture(scope="session")
def demo_parts():
    """{part id: SimPart} of the demo catalogue, as a simulated bench gets them."""
    from benchkit.catalogue import DEMO_PARTS, load_parts
    from benchkit.commands.sim import simulated_parts

    return simulated_parts(load_parts(DEMO_PARTS))


def make_part(spec, noise: bool = True, seed: int = 1):
    """A simulated part on a virtual clock; noise=False gives the noise-free meter."""
    from instruments.sim.physics import SimulatedPart

    if not noise:
        spec = dataclasses.replace(spec, sim=dataclasses.replace(spec.sim, noise_frac=0.0))
    clock = VirtualClock()
    return SimulatedPart(spec, clock, np.random.default_rng(seed)), clock


def settle(part, clock, bias_V: float, wait_s: float = 60.0):
    """Step to the bias and wait out the relaxation (12 time constants and more), short next
    to the slow bias aging (30 min), which the settled truth leaves out."""
    part.set_bias(bias_V)
    clock.sleep(wait_s)


def need_ngspice() -> str:
    import os
    import shutil

    exe = shutil.which("ngspice")
    if exe is None:
        if os.environ.get("CI") == "true":  # under CI a missing package is a failure, not a skip
            pytest.fail("ngspice not installed (CI=true: .ci/run installs it)")
        pytest.skip("ngspice not installed")
    return exe


def wideband_curve(bias_points=(0.0, 6.0, 12.0, 16.0)):
    """A curve document with a wideband model of an invented 4.7 uF part (C falls with bias)."""
    from fits import fit_sweep
    from fits.wideband import fit_impedance, impedance_ohm, WidebandModel

    V = np.linspace(0.0, 16.0, 17)
    C0 = 4.7e-6
    out = fit_sweep(V, C0 / (1 + (V / 9.0) ** 2), sigma_F=np.full(V.size, 1e-9), model="landau",
                    part_id="BD-1006", sample_id="FX-06")
    fits = []
    for b in bias_points:
        C = C0 / (1 + (b / 9.0) ** 2)
        Z = impedance_ohm(FREQS_HZ, C, 0.03 - 0.001 * b, 0.004, 1.0e-9)
        fits.append(fit_impedance(FREQS_HZ, Z, bias_V=b))
    from fits import Curve

    return Curve.from_dict({**out.curve.to_dict(), "wideband": WidebandModel(fits).to_dict()})
