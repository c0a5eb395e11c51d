"""Library answers about impedance against frequency: ESR, |Z|, self-resonance at a bias, and a
plot of |Z| and ESR against frequency for several biases (matplotlib Agg, saved atomically).

The numbers come from the wideband model a curve carries (fits/wideband.py); between fitted
biases its parameters are interpolated linearly, never extrapolated beyond them, and a
frequency outside the band it was fitted on is refused.
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np

from benchkit.atomic import write_bytes_atomic
from benchkit.errors import UserError


def wideband_record(records):
    """The newest curve record of a part that carries a wideband model."""
    with_wb = [r for r in records if r.curve.wideband is not None]
    if not with_wb:
        raise UserError("no curve of this part has a wideband model; add a run measured with a "
                        "frequency list ([frequency] in the plan)")
    return with_wb[-1]


def answer(curve, bias_V: float, freq_Hz: float | None = None) -> dict:
    """ESR, |Z|, phase, C and their uncertainties at (bias, frequency), and the SRF at the bias."""
    from benchkit.exports import wideband_fit

    fit = wideband_fit(curve, bias_V)
    out = {"bias_V": fit.bias_V, "interpolated": fit.interpolated,
           "srf_Hz": fit.srf_Hz(), "u_srf_Hz": fit.u_srf(), "esl_H": fit.esl_H,
           "u_esl_H": fit.stderr["esl_H"], "esr_floor_ohm": fit.params["esr_ohm"],
           "freq_range_Hz": list(fit.freq_range_Hz)}
    if freq_Hz is not None:
        lo, hi = fit.freq_range_Hz
        if not (lo * (1 - 1e-9) <= freq_Hz <= hi * (1 + 1e-9)):
            raise UserError(f"--freq {freq_Hz:g} Hz: outside the measured band {lo:g} .. {hi:g} Hz")
        Z = fit.Z(freq_Hz)
        out.update({"freq_Hz": float(freq_Hz), "Z_abs_ohm": abs(Z), "u_Z_abs_ohm": fit.u_Z_abs(freq_Hz),
                    "theta_deg": math.degrees(math.atan2(Z.imag, Z.real)),
                    "esr_ohm": Z.real, "u_esr_ohm": fit.u_esr(freq_Hz), "C_F": fit.C_F(freq_Hz)})
    return out


def plot_impedance(curve, biases_V, path: str | Path, title: str = "") -> Path:
    """|Z| and ESR against frequency (log-log) at each bias, one PNG."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from benchkit.exports import freq_grid, wideband_fit

    fig = Figure(figsize=(7.5, 6.0), dpi=110)
    FigureCanvasAgg(fig)  # draws to memory; the process's backend is left alone
    ax_z, ax_r = fig.add_subplot(2, 1, 1), fig.add_subplot(2, 1, 2)
    for V in biases_V:
        fit = wideband_fit(curve, V)
        f = freq_grid(fit, 300)
        ax_z.loglog(f, fit.Z_abs(f), label=f"{fit.bias_V:g} V")
        ax_r.loglog(f, fit.esr_ohm(f), label=f"{fit.bias_V:g} V")
    ax_z.set_ylabel("|Z| (\u03a9)")
    ax_r.set_ylabel("ESR (\u03a9)")
    ax_r.set_xlabel("frequency (Hz)")
    for ax in (ax_z, ax_r):
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8)
    if title:
        ax_z.set_title(title)
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return write_bytes_atomic(path, buf.getvalue())
