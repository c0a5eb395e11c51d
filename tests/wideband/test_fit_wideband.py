"""The wideband model fitted to Z(f): against the handbook and against the simulator's truth.

Sources: series model Z = ESR + j(w*ESL - 1/(w*C)) and f_srf = 1/(2*pi*sqrt(ESL*C))
[published: impedance-measurement handbook relations]; open/short correction (handbook
compensation appendix); 0.1 % basic accuracy of a bench LCR meter as the weighting floor
[common practice, from memory].
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from benchkit.compensation import open_short
from fits import Curve
from fits.errors import CurveDocumentError, FitError, OutOfRange
from fits.wideband import WidebandModel, fit_impedance, fit_wideband, impedance_ohm
from instruments.sim import wideband as sw

from .conftest import FREQS_HZ, make_part, settle

METER_FLOOR_REL = 1e-3  # basic accuracy of a bench LCR meter, 0.1 % [common practice, from memory]


def test_ideal_series_rlc_is_recovered_exactly():
    # handbook series RLC: 2.2 uF, 7 mohm, 0.7 nH; D = 0 makes the dielectric an ideal C
    C, R, L = 2.2e-6, 7e-3, 0.7e-9
    w = 2 * np.pi * FREQS_HZ
    Z = R + 1j * (w * L - 1 / (w * C))
    fit = fit_impedance(FREQS_HZ, Z, bias_V=0.0)
    assert fit.params["C_F"] == pytest.approx(C, rel=1e-6)
    assert fit.params["esl_H"] == pytest.approx(L, rel=1e-6)
    assert fit.params["esr_ohm"] == pytest.approx(R, rel=1e-5)
    assert fit.params["D"] == pytest.approx(0.0, abs=1e-7)
    assert fit.srf_Hz() == pytest.approx(1 / (2 * math.pi * math.sqrt(L * C)), rel=1e-6)


def _measure_corrected(part, res, V, osc, n, rng):
    """Mean of n readings at each frequency, open/short corrected with n-reading residuals,
    and the relative standard error of each corrected point (scatter, floored)."""
    Zc, sig = [], []
    for f in FREQS_HZ:
        reps = np.array([sw.measure(part, f, osc, 25.0, 100.0, res).Z_ohm for _ in range(n)])
        Zo = np.mean([sw.fixture_reading(res, "open", f, osc, 100.0, 0.0, rng, 1e-4).Z_ohm
                      for _ in range(n)])
        Zs = np.mean([sw.fixture_reading(res, "short", f, osc, 100.0, 0.0, rng, 1e-4).Z_ohm
                      for _ in range(n)])
        z = open_short(reps.mean(), Zo, Zs)
        se = np.std(np.abs(reps - reps.mean()), ddof=1) / math.sqrt(n) * math.sqrt(2)
        Zc.append(z)
        sig.append(math.hypot(se / abs(z), METER_FLOOR_REL))
    return np.array(Zc), np.array(sig)


@pytest.mark.parametrize("pid", ["BD-1006", "BD-1005"])
def test_fit_within_2_percent_of_the_simulators_truth_at_every_bias(demo_parts, pid):
    """Noisy simulated meter behind 2 pF / 10 nH, open/short corrected, 8 readings a point;
    the fitted |Z| within 2 % of the true |Z| at every frequency and bias, SRF within 2 %."""
    spec = demo_parts[pid]
    part, clock = make_part(spec, noise=True, seed=7)
    res = sw.FixtureResiduals(1e-3, 10e-9, 2e-12, 1e-10)
    rng = np.random.default_rng(11)
    osc = 0.5
    rows = []
    for V in np.linspace(0.0, spec.rated_V, 5):
        settle(part, clock, V)
        Zc, sig = _measure_corrected(part, res, V, osc, 8, rng)
        rows.append((V, Zc, sig))
    model = fit_wideband(np.repeat([r[0] for r in rows], FREQS_HZ.size),
                         np.tile(FREQS_HZ, len(rows)), np.concatenate([r[1] for r in rows]),
                         sigma_rel=np.concatenate([r[2] for r in rows]))
    for V, _, _ in rows:
        fit = model.at(V)
        truth = np.array([sw.true_impedance_ohm(part, V, f, osc_level_Vrms=osc, residuals=res)
                          for f in FREQS_HZ])
        err = np.abs(fit.Z_abs(FREQS_HZ) / np.abs(truth) - 1)
        srf = 10 ** brentq(lambda lf: sw.true_impedance_ohm(
            part, V, 10 ** lf, osc_level_Vrms=osc, residuals=res).imag, 4, 9, xtol=1e-12)
        print(f"{pid} {V:5.2f} V: worst |Z| error {100 * err.max():.3f} %, SRF {fit.srf_Hz():.5g} Hz "
              f"vs {srf:.5g} Hz ({100 * (fit.srf_Hz() / srf - 1):+.3f} %, u {100 * fit.u_srf() / srf:.3f} %)")
        assert err.max() < 0.02
        assert fit.srf_Hz() == pytest.approx(srf, rel=0.02)
        assert 0 < fit.u_srf() < 0.02 * srf and all(v > 0 for v in fit.stderr.values())


def _model():
    fits = [fit_impedance(FREQS_HZ, impedance_ohm(FREQS_HZ, C, 0.02, 0.01, 1e-9), bias_V=V)
            for V, C in ((0.0, 4e-6), (10.0, 2e-6))]
    return WidebandModel(fits)


def test_interpolates_between_biases_never_beyond():
    m = _model()
    mid = m.at(5.0)
    assert mid.interpolated and mid.params["C_F"] == pytest.approx(3e-6, rel=1e-6)
    with pytest.raises(OutOfRange, match="never extrapolated"):
        m.at(12.0)


def test_curve_document_carries_the_wideband_model():
    from fits import fit_sweep

    V = np.linspace(0, 10, 11)
    out = fit_sweep(V, 4e-6 / (1 + (V / 8) ** 2), sigma_F=np.full(V.size, 1e-9), model="landau")
    c = Curve.from_dict({**out.curve.to_dict(), "wideband": _model().to_dict()})
    back = Curve.from_json(c.to_json())
    assert back.wideband.at(10.0).params == c.wideband.at(10.0).params
    assert "wideband" not in out.curve.to_dict()  # absent unless measured
    bad = c.to_dict()
    bad["wideband"]["biases"][0]["params"]["esl_H"] = -1.0
    with pytest.raises(CurveDocumentError, match=r"wideband.biases\[0\].params.esl_H"):
        Curve.from_dict(bad)


def test_too_few_frequencies_is_a_fit_error():
    with pytest.raises(FitError, match="at least 6"):
        fit_impedance(FREQS_HZ[:4], np.ones(4) + 0j)
