"""A sample's points split by the temperature they were measured at (one group per soak).

A run with a [temperature] list measures every sample at several chamber set points; a C(V)
curve belongs to one temperature, so whoever fits such a run fits each group on its own. The
groups come from the points' own thermometer readings (temp_C), clustered like
fits.family.group_temperatures: readings of one soak lie within TEMP_GROUP_TOL_C of each
other, set points of a plan at least 5 degC apart (benchkit/sweep/temperature.py).
"""

from __future__ import annotations

import numpy as np

TEMP_GROUP_TOL_C = 2.0


def split_by_temperature(smp, tol_C: float = TEMP_GROUP_TOL_C) -> list:
    """[(mean temp_C or None, SamplePoints of that group)], coldest first; one group when the
    points carry no temperature or all lie within tol_C."""
    T = np.asarray(smp.temp_C, dtype=float)
    if T.size == 0 or not np.all(np.isfinite(T)) or np.ptp(T) <= tol_C:
        mean = float(np.mean(T)) if T.size and np.all(np.isfinite(T)) else None
        return [(mean, smp)]
    from fits.family import group_temperatures

    labels = group_temperatures(T, tol_C)
    out = []
    for g in range(int(labels.max()) + 1):
        keep = labels == g
        out.append((float(np.mean(T[keep])), smp.take(keep, [])))
    return out
