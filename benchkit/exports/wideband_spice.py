"""The wideband model at one bias as a linear SPICE subcircuit that is right in AC analysis.

    .subckt NAME a b
    RS a n1 ESR_floor         conductor floor
    LS n1 n2 ESL              series inductance
    C0 n2 b C_inf             the dielectric: C_inf in parallel with R_k-C_k branches
    R1 n2 m1 R_1 / C1 m1 b C_1 ...
    .ends

Why a ladder: the dielectric is a constant-phase element (fits/wideband.py), which no finite
set of R, L, C reproduces exactly; a parallel bank of series R-C branches whose time constants
are spread evenly in log frequency approximates it as closely as wanted over a band (a Foster
form of a distributed RC line, the usual way a CPE is put into a circuit simulator [common
practice]). The branch capacitances are fitted by non-negative least squares (scipy.optimize.nnls)
to the model's dielectric admittance, one decade beyond each end of the band, with relative
weights. Every element is positive, so the network is passive and works in transient too.

The network is the part at the chosen bias only: it is linear (ngspice's .ac linearises at the
DC operating point anyway [common practice]); the charge-conserving C(V) model is the other
SPICE export.
"""

from __future__ import annotations

import numpy as np

from benchkit.exports.spice import _comment, subckt_name
from benchkit.units import format_value

BRANCHES_PER_DECADE = 3
BAND_MARGIN_DECADES = 1.0


def ladder(fit, f_lo_Hz: float, f_hi_Hz: float, per_decade: int = BRANCHES_PER_DECADE):
    """(C_inf_F, [(R_k_ohm, C_k_F)]) approximating the fit's dielectric over the band."""
    from scipy.optimize import nnls

    lo = np.log10(f_lo_Hz) - BAND_MARGIN_DECADES
    hi = np.log10(f_hi_Hz) + BAND_MARGIN_DECADES
    f = np.logspace(lo, hi, int(40 * (hi - lo)) + 1)
    w = 2 * np.pi * f
    p = fit.params
    C = fit.C_F(f)
    Y = w * C * (p["D"] + 1j)  # the dielectric admittance of the model
    n = int(np.ceil((hi - lo) * per_decade)) + 1
    tau = 1.0 / (2 * np.pi * np.logspace(lo - 0.5, hi + 0.5, n))
    cols = [1j * w] + [1j * w / (1 + 1j * w * t) for t in tau]
    A = np.array(cols).T / np.abs(Y)[:, None]
    b = Y / np.abs(Y)
    scale = float(np.max(C))
    x, _ = nnls(np.vstack([A.real, A.imag]) * scale, np.concatenate([b.real, b.imag]))
    x = x * scale
    branches = [(float(t / c), float(c)) for t, c in zip(tau, x[1:]) if c > 0]
    return float(x[0]), branches


def ladder_impedance(freq_Hz, esr_ohm, esl_H, C_inf, branches):
    """Z of the subcircuit, as ngspice should compute it (for the tests and the CSV)."""
    w = 2 * np.pi * np.asarray(freq_Hz, dtype=float)
    Y = 1j * w * C_inf + sum(1j * w * c / (1 + 1j * w * r * c) for r, c in branches)
    return esr_ohm + 1j * w * esl_H + 1 / Y


def wideband_subcircuit(fit, *, name: str, f_lo_Hz: float, f_hi_Hz: float,
                        part_id: str | None = None, notes: list[str] = ()) -> str:
    """Netlist text of the subcircuit at fit.bias_V (ends with a newline)."""
    name = subckt_name(name)
    p = fit.params
    C_inf, branches = ladder(fit, f_lo_Hz, f_hi_Hz)
    lines = [
        f"* {name}: wideband AC model at {fit.bias_V:g} V written by benchkit (linear, passive)",
        f"* part {_comment(part_id)}; equivalent circuit ESR floor + ESL + constant-phase dielectric",
        f"* C({fit.f_ref_Hz:g} Hz) = {format_value(p['C_F'], 'F')}, D = {p['D']:.6g}, "
        f"ESR floor = {float(p['esr_ohm'])!r} ohm, ESL = {float(p['esl_H'])!r} H, "
        f"SRF = {format_value(fit.srf_Hz(), 'Hz')}",
        f"* reproduces the model from {format_value(f_lo_Hz, 'Hz')} to {format_value(f_hi_Hz, 'Hz')}"
        f"{' (interpolated between fitted biases)' if fit.interpolated else ''};",
        "* the bias is not applied by this network: it is the part at that bias",
    ]
    lines += [f"* {_comment(n)}" for n in notes]
    lines.append(f".subckt {name} a b")
    node = "a"
    if p["esr_ohm"] > 0:
        lines.append(f"RS {node} n1 {float(p['esr_ohm'])!r}")
        node = "n1"
    if p["esl_H"] > 0:
        lines.append(f"LS {node} n2 {float(p['esl_H'])!r}")
        node = "n2"
    lines.append(f"C0 {node} b {C_inf!r}")
    for k, (r, c) in enumerate(branches, start=1):
        lines.append(f"R{k} {node} m{k} {r!r}")
        lines.append(f"C{k} m{k} b {c!r}")
    lines.append(f".ends {name}")
    return "\n".join(lines) + "\n"
