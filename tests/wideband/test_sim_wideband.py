"""The simulated meter across frequency, against the handbook's series-model relations.

Sources: impedance-measurement handbook relations (series model Z = ESR + j(w*ESL - 1/(w*C)),
self-resonance f = 1/(2*pi*sqrt(ESL*C)) where |Z| = ESR and the phase crosses 0; D = w*Cs*Rs);
L-network of the handbook's compensation appendix (open reads Z_s + 1/Y_o, short reads Z_s).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from instruments.sim import wideband as sw
from instruments.sim.fixture import BiasFixture, Wiring

from .conftest import FREQS_HZ, make_part, settle


def _srf(part, V, osc=0.5):
    return 10 ** brentq(lambda lf: sw.true_impedance_ohm(part, V, 10 ** lf, osc_level_Vrms=osc).imag,
                        4.0, 9.0, xtol=1e-12)


@pytest.mark.parametrize("pid", ["BD-1001", "BD-1004", "BD-1006"])
def test_self_resonance_follows_the_handbook_formula(demo_parts, pid):
    part, _ = make_part(demo_parts[pid], noise=False)
    for V in (0.0, 0.5 * demo_parts[pid].rated_V):
        f0 = _srf(part, V)
        Z0 = sw.true_impedance_ohm(part, V, f0, osc_level_Vrms=0.5)
        # at resonance |Z| = ESR and the phase crosses 0 (handbook)
        assert abs(Z0) == pytest.approx(Z0.real, rel=1e-9)
        # handbook f = 1/(2 pi sqrt(ESL C)), with C the dielectric's own C at f0 and level
        C = part._C_diel(part.branch_state_V(V), 25.0, f0,
                         0.5 * abs(Z0) / abs(100 + Z0), 0.0, 0.0)
        L = sw.esl_H(part.spec)
        D = part.D_dielectric(part.branch_state_V(V))
        # series C of the lossy dielectric is C*(1 + D^2) (handbook Cs = Cp*(1 + D^2))
        assert f0 == pytest.approx(1 / (2 * math.pi * math.sqrt(L * C * (1 + D * D))), rel=1e-4)


def test_esr_rises_toward_low_frequency_above_the_conductor_floor(demo_parts):
    spec = demo_parts["BD-1006"]
    part, _ = make_part(spec, noise=False)
    esr = np.array([sw.true_impedance_ohm(part, 0.0, f, osc_level_Vrms=0.5).real for f in FREQS_HZ])
    assert np.all(np.diff(esr[FREQS_HZ < 3e6]) < 0)  # falls with frequency ...
    assert esr.min() > spec.sim.esr_ohm  # ... toward, never below, the conductor floor
    # derived from D = w*Cs*Rs: the dielectric part is about D/(w*C) at low frequency
    f = 100.0
    Z = sw.true_impedance_ohm(part, 0.0, f, osc_level_Vrms=0.5)
    Cs = -1 / (2 * math.pi * f * Z.imag)
    D = part.D_dielectric(0.0)
    assert Z.real - spec.sim.esr_ohm == pytest.approx(D / (2 * math.pi * f * Cs), rel=0.01)


def test_inductive_above_resonance_and_negative_series_c_there(demo_parts):
    part, clock = make_part(demo_parts["BD-1006"], noise=False)
    settle(part, clock, 0.0)
    res = sw.FixtureResiduals()
    m = sw.measure(part, 1e7, 0.5, 25.0, 100.0, res)
    assert m.theta_deg > 80 and m.Cs_F < 0  # |Z|-theta is the function to use there
    # handbook relation D = w*Cs*Rs holds for every reading
    assert m.D == pytest.approx(2 * math.pi * 1e7 * m.Cs_F * m.Rs_ohm, rel=1e-12)


def _bench(parts, wiring):
    from instruments.clock import VirtualClock
    from instruments.sim.physics import SimulatedPart

    clock = VirtualClock()
    spec = parts["BD-1006"]
    fx = BiasFixture(clock, {6: lambda t: SimulatedPart(spec, t, np.random.default_rng(0))},
                     wiring=wiring)
    return fx


def test_open_and_short_positions_read_the_l_network(demo_parts):
    w = Wiring(stray_C_F=2e-12, stray_G_S=0.0, residual_R_ohm=1e-3, residual_L_H=10e-9,
               short_channel=16)
    fx = _bench(demo_parts, w)
    f = 1e6
    omega = 2 * math.pi * f
    fx.close_channel(16)  # the short position
    short = fx.measure(f, 0.5).Z_ohm
    fx.open_channel(16)
    fx.close_channel(15)  # an empty channel: the open position
    open_ = fx.measure(f, 0.5).Z_ohm
    assert short == pytest.approx(complex(1e-3, omega * 10e-9), rel=1e-12)
    assert open_ == pytest.approx(complex(1e-3, omega * 10e-9) + 1 / (1j * omega * 2e-12), rel=1e-12)


def test_esl_field_is_optional_and_checked(demo_parts):
    # parts files written before the field still load (default 1 nH); a negative one is refused
    from instruments.sim.simpart import SimPartError, sim_part

    p = demo_parts["BD-1006"]
    table = {k: getattr(p.sim, k) for k in p.sim.__dataclass_fields__}
    table = {k: (list(v) if isinstance(v, tuple) else v) for k, v in table.items()
             if not (k == "tempco_ppm_per_K")}
    del table["esl_H"]
    part = sim_part("BD-1006", p.nominal_C_F, p.rated_V, p.band, p.ref_freq_Hz, p.ref_level_Vrms,
                    table, "parts.toml part BD-1006")
    assert part.sim.esl_H == 1.0e-9
    with pytest.raises(SimPartError, match="sim.esl_H"):
        sim_part("BD-1006", p.nominal_C_F, p.rated_V, p.band, p.ref_freq_Hz, p.ref_level_Vrms,
                 {**table, "esl_H": -1e-9}, "parts.toml part BD-1006")
