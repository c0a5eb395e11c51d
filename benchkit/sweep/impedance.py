"""The frequency-list rows of a run directory, read as Z(f) per sample and bias, and fitted.

A row flagged `freq_list` (benchkit/sweep/frequency.py) holds Cs = C_F and Rs = Rs_ohm of the
(corrected) impedance, so Z = Rs - j/(w*Cs) [published: impedance-measurement handbook
relations]. Its weight: the scatter of the row's readings, C_std_F/|Cs|/sqrt(n) is the
relative scatter of X = Im Z (X = -1/(w*Cs)), so u(X) = |X|*C_std_F/|Cs|/sqrt(n), taken
relative to |Z|, combined with the meter's basic accuracy of 0.1 % of |Z| [common practice,
from memory] (JCGM 100:2008: root sum of squares).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from benchkit.errors import UserError
from benchkit.sweep import runlog
from benchkit.sweep.frequency import is_frequency_row
from benchkit.sweep.rundir import LEFT_OUT_FLAGS, flags_of

METER_BASIC_ACCURACY_REL = 1e-3


@dataclass(frozen=True)
class ImpedanceData:
    """Z(f) of one sample: one entry per (bias, frequency) row kept."""

    sample_id: str
    part_id: str
    bias_V: np.ndarray
    freq_Hz: np.ndarray
    Z_ohm: np.ndarray
    sigma_rel: np.ndarray


def impedance_rows(rows: list[dict], where: str = "points.csv") -> dict[str, ImpedanceData]:
    """{sample_id: ImpedanceData} from rows of points.csv (only the frequency-list rows)."""
    acc: dict[str, list] = {}
    parts: dict[str, str] = {}
    for line, r in enumerate(rows, start=2):
        if not is_frequency_row(r) or LEFT_OUT_FLAGS & flags_of(r):
            continue
        try:
            V, f, Cs, Rs = (float(r[k]) for k in ("bias_set_V", "freq_Hz", "C_F", "Rs_ohm"))
            std = float(r["C_std_F"]) if r.get("C_std_F") not in (None, "") else math.nan
            n = max(int(float(r.get("n_readings") or 1)), 1)
        except (TypeError, ValueError):
            raise UserError(f"{where}: line {line}: a frequency-list row needs numbers in "
                            "bias_set_V, freq_Hz, C_F and Rs_ohm") from None
        if not (math.isfinite(Cs) and Cs != 0 and f > 0):
            continue
        X = -1.0 / (2 * math.pi * f * Cs)
        Z = complex(Rs, X)
        u = abs(X) * std / abs(Cs) / math.sqrt(n) / abs(Z) if math.isfinite(std) else 0.0
        acc.setdefault(r["sample_id"], []).append((V, f, Z, math.hypot(u, METER_BASIC_ACCURACY_REL)))
        parts[r["sample_id"]] = r["part_id"]
    out = {}
    for sid, items in acc.items():
        a = list(zip(*items))
        out[sid] = ImpedanceData(sid, parts[sid], np.array(a[0]), np.array(a[1]),
                                 np.array(a[2], dtype=complex), np.array(a[3]))
    return out


def read_impedance(run_dir: str | Path) -> dict[str, ImpedanceData]:
    rows, _ = runlog.read_points(Path(run_dir))
    return impedance_rows(rows, str(Path(run_dir) / runlog.POINTS_FILE))


def wideband_model(rows: list[dict], sample_id: str, conditions: dict | None = None,
                   where: str = "points.csv"):
    """The fitted fits.wideband.WidebandModel of one sample, or None without frequency rows."""
    from fits.errors import FitsError
    from fits.wideband import fit_wideband

    data = impedance_rows(rows, where).get(sample_id)
    if data is None:
        return None
    try:
        return fit_wideband(data.bias_V, data.freq_Hz, data.Z_ohm, sigma_rel=data.sigma_rel,
                            conditions=conditions)
    except FitsError as exc:
        raise UserError(f"{where}: sample {sample_id}: wideband fit: {exc}") from None
