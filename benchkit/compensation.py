"""Open/short (and open/short/load) correction of the fixture, per frequency.

Why: the leads and contacts between the meter and the part add a residual series impedance
Z_s and a stray admittance Y_o. Below a few hundred kHz they hardly matter; near the part's
self-resonance (milliohms behind nanohenries) the reading is mostly fixture. The residuals
depend on frequency, so they are measured on the same frequency list as the part.

L network of the impedance-measurement handbook's compensation appendix:

    open/short:        Z_dut = (Z_m - Z_s) / (1 - (Z_m - Z_s)*Y_o)
    open/short/load:   Z_dut = Z_std*(Z_s - Z_m)*(Z_lm - Z_o) / ((Z_m - Z_o)*(Z_s - Z_lm))

with Z_o, Z_s the open and short readings, Z_lm the load standard as measured and Z_std its
known value [published: impedance-measurement handbook, compensation appendix]. Y_o is taken
as 1/(Z_o - Z_s), the open admittance with the short's residual removed: exactly the L
network's, and the handbook's 1/Z_o wherever |Z_o| >> |Z_s| [derived].
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from benchkit.errors import UserError

RESIDUALS_COLUMNS = ("freq_Hz", "open_re_ohm", "open_im_ohm", "short_re_ohm", "short_im_ohm")


def open_short(Z_m, Z_open, Z_short):
    """Z_dut from the reading and the open and short readings at the same frequencies."""
    Zm, Zo, Zs = (np.asarray(x, dtype=complex) for x in (Z_m, Z_open, Z_short))
    d = Zm - Zs
    Yo = 1.0 / (Zo - Zs)
    out = d / (1.0 - d * Yo)
    return complex(out) if out.ndim == 0 else out


def open_short_load(Z_m, Z_open, Z_short, Z_load_measured, Z_load_true):
    """Z_dut with a load standard as well (the handbook's three-term form)."""
    Zm, Zo, Zs, Zlm, Zstd = (np.asarray(x, dtype=complex)
                             for x in (Z_m, Z_open, Z_short, Z_load_measured, Z_load_true))
    out = Zstd * (Zs - Zm) * (Zlm - Zo) / ((Zm - Zo) * (Zs - Zlm))
    return complex(out) if out.ndim == 0 else out


@dataclass(frozen=True)
class Residuals:
    """Open and short readings of the fixture on one frequency list (ascending)."""

    freq_Hz: np.ndarray
    Z_open_ohm: np.ndarray
    Z_short_ohm: np.ndarray
    source: str = "measured"  # "measured" (scanner positions) or the file it was read from

    def at(self, freq_Hz: float) -> tuple[complex, complex]:
        """(Z_open, Z_short) at one of the list's frequencies (relative tolerance 1e-9)."""
        i = int(np.argmin(np.abs(self.freq_Hz - freq_Hz)))
        if abs(self.freq_Hz[i] - freq_Hz) > 1e-9 * freq_Hz:
            raise UserError(f"open/short residuals: no reading at {freq_Hz:g} Hz; measure the "
                            "residuals on the plan's frequency list")
        return complex(self.Z_open_ohm[i]), complex(self.Z_short_ohm[i])

    def correct(self, freq_Hz: float, Z_m: complex) -> complex:
        Zo, Zs = self.at(freq_Hz)
        return open_short(Z_m, Zo, Zs)

    def csv_text(self) -> str:
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(RESIDUALS_COLUMNS)
        for f, zo, zs in zip(self.freq_Hz, self.Z_open_ohm, self.Z_short_ohm):
            w.writerow([repr(float(x)) for x in (f, zo.real, zo.imag, zs.real, zs.imag)])
        return buf.getvalue()

    def summary(self) -> dict:
        """What run.json records about the correction."""
        return {"method": "open/short (L network)", "source": self.source,
                "n_frequencies": int(self.freq_Hz.size),
                "freq_range_Hz": [float(self.freq_Hz[0]), float(self.freq_Hz[-1])]}


def read_residuals(path: str | Path) -> Residuals:
    """A residuals CSV (RESIDUALS_COLUMNS); UserError naming the file and row otherwise."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{p}: cannot read the open/short residuals file ({exc})") from None
    rows = list(csv.reader(io.StringIO(text)))
    if not rows or tuple(h.strip() for h in rows[0]) != RESIDUALS_COLUMNS:
        raise UserError(f"{p}: the first row must be {','.join(RESIDUALS_COLUMNS)}")
    data = []
    for n, r in enumerate(rows[1:], start=2):
        if not r:
            continue
        try:
            vals = [float(x) for x in r]
        except ValueError:
            vals = []
        if len(vals) != 5 or not all(math.isfinite(v) for v in vals) or vals[0] <= 0:
            raise UserError(f"{p}: row {n}: five finite numbers expected, freq_Hz > 0; fix the row")
        data.append(vals)
    if not data:
        raise UserError(f"{p}: no residual rows; measure open and short first")
    a = np.array(sorted(data), dtype=float)
    if np.any(np.diff(a[:, 0]) <= 0):
        raise UserError(f"{p}: a frequency appears twice; one row per frequency")
    return Residuals(a[:, 0], a[:, 1] + 1j * a[:, 2], a[:, 3] + 1j * a[:, 4], source=str(p))
