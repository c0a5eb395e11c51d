"""The wideband model at one bias as a table against frequency: |Z|, phase, ESR, ESL, C.

Columns: freq_Hz, Z_abs_ohm, theta_deg, ESR_ohm, ESL_H, C_F, C_valid, u_Z_abs_ohm.
C_F is the dielectric's capacitance C(f) of the model; the apparent -1/(w*Im Z) a meter shows
diverges near self-resonance, so C_valid is 1 only where w^2*ESL*C < 0.1 [derived: report C
only where w^2*ESL*C << 1]. Plain CSV, floats at full precision (repr).
"""

from __future__ import annotations

import csv
import io

import numpy as np

COLUMNS = ("freq_Hz", "Z_abs_ohm", "theta_deg", "ESR_ohm", "ESL_H", "C_F", "C_valid", "u_Z_abs_ohm")
C_VALID_LIMIT = 0.1


def impedance_csv(fit, freq_Hz) -> str:
    f = np.asarray(freq_Hz, dtype=float).ravel()
    Z = fit.Z(f)
    C = fit.C_F(f)
    w = 2 * np.pi * f
    valid = w**2 * fit.esl_H * C < C_VALID_LIMIT
    buf = io.StringIO()
    out = csv.writer(buf, lineterminator="\n")
    out.writerow(COLUMNS)
    for i in range(f.size):
        out.writerow([repr(float(f[i])), repr(float(abs(Z[i]))), repr(float(np.degrees(np.angle(Z[i])))),
                      repr(float(Z[i].real)), repr(float(fit.esl_H)), repr(float(C[i])),
                      "1" if valid[i] else "0", repr(float(fit.u_Z_abs(f[i])))])
    return buf.getvalue()
