"""Checking fit input and deriving per-point standard deviations (the fit weights are 1/sigma).

Weighting, in order of preference:
1. "given sigma": the caller's sigma_F (e.g. C_std_F/sqrt(n_readings) of each point);
2. "repeat scatter": where several points share one bias value (repeated sweeps), the
   pooled relative scatter within those groups, s_rel, gives sigma_i = s_rel*|mean C at that
   bias| for every point. Pooling (sum of squared deviations over sum of (n_g - 1)) is used
   because two or three repeats per bias give very unsteady single-group estimates; the
   relative form follows the usual "% of reading" error of an LCR meter [common practice];
3. "none": unit weights, which assume the same noise at every bias; the covariance is then
   scaled by the residual scatter (with noise proportional to C, pass sigma_F instead: unit
   weights then understate the uncertainty of the low-bias parameters).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from fits.errors import FitError

#: bias values closer than this (volts) count as one bias when grouping repeats
BIAS_GROUP_TOL_V = 1e-9


@dataclass(frozen=True)
class SweepData:
    """One branch of a sweep, checked: bias, capacitance, sigma (None = unweighted)."""

    bias_V: np.ndarray
    C_F: np.ndarray
    sigma_F: np.ndarray | None
    weighting: str  # "given sigma" | "repeat scatter" | "none"

    @property
    def n(self) -> int:
        return int(self.bias_V.size)

    @cached_property
    def n_distinct(self) -> int:
        return int(np.unique(np.round(self.bias_V / BIAS_GROUP_TOL_V)).size)

    @property
    def weights(self) -> np.ndarray:
        """1/sigma, or ones when unweighted."""
        return np.ones_like(self.C_F) if self.sigma_F is None else 1.0 / self.sigma_F


def _as_1d(values, what: str) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise FitError(f"{what}: not a list of numbers") from None
    if arr.ndim != 1:
        raise FitError(f"{what}: expected a 1-D list of values, got shape {arr.shape}")
    return arr


def check_sweep(bias_V, C_F, sigma_F=None, what: str = "sweep") -> SweepData:
    """Validate fit input; raise FitError with one clear line when it cannot be fitted."""
    V = _as_1d(bias_V, f"{what}: bias_V")
    C = _as_1d(C_F, f"{what}: C_F")
    if V.size != C.size:
        raise FitError(f"{what}: {V.size} bias values but {C.size} capacitance values; "
                       "give one capacitance per bias")
    if V.size == 0:
        raise FitError(f"{what}: no points to fit")
    for arr, name in ((V, "bias_V"), (C, "C_F")):
        bad = ~np.isfinite(arr)
        if bad.any():
            i = int(np.argmax(bad))
            raise FitError(f"{what}: {name}[{i}] is {float(arr[i])!r}; remove NaN/inf points "
                           "before fitting")
    if np.any(C <= 0):
        i = int(np.argmax(C <= 0))
        raise FitError(f"{what}: C_F[{i}] = {float(C[i])!r} at {V[i]:g} V is not positive; "
                       "a capacitance reading must be > 0 (check the meter function and range)")
    if np.ptp(V) <= BIAS_GROUP_TOL_V:
        raise FitError(f"{what}: all {V.size} points are at one bias ({V[0]:g} V); "
                       "a C(V) fit needs readings at several bias values")
    if sigma_F is not None:
        s = _as_1d(sigma_F, f"{what}: sigma_F")
        if s.size != V.size:
            raise FitError(f"{what}: {s.size} sigma values for {V.size} points")
        if np.any(~np.isfinite(s)) or np.any(s <= 0):
            i = int(np.argmax(~np.isfinite(s) | (s <= 0)))
            raise FitError(f"{what}: sigma_F[{i}] = {float(s[i])!r} must be a positive number "
                           "(or pass sigma_F=None to weight from repeats)")
        return SweepData(V, C, s, "given sigma")
    s = repeat_sigma(V, C)
    if s is not None:
        return SweepData(V, C, s, "repeat scatter")
    return SweepData(V, C, None, "none")


def repeat_sigma(bias_V, C_F) -> np.ndarray | None:
    """Per-point sigma from the pooled relative scatter of repeated biases, or None."""
    V = np.asarray(bias_V, dtype=float)
    C = np.asarray(C_F, dtype=float)
    _, group = np.unique(np.round(V / BIAS_GROUP_TOL_V), return_inverse=True)
    counts = np.bincount(group)
    if not np.any(counts >= 2):
        return None
    means = np.bincount(group, weights=C) / counts
    rel = (C - means[group]) / means[group]
    dof = int(np.sum(counts - 1))
    pooled = float(np.sum(rel**2) / dof)
    if pooled <= 0.0:
        return None
    return np.sqrt(pooled) * np.abs(means[group])
