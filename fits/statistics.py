"""Goodness of fit and the information criteria used to choose a model.

AIC and BIC follow lmfit's convention (lmfit/minimizer.py): with chi2 the weighted sum of
squared residuals of n points and k free parameters,
    AIC = n*ln(chi2/n) + 2k,   BIC = n*ln(chi2/n) + k*ln(n).
This is the Gaussian log-likelihood with the noise level profiled out (H. Akaike, IEEE Trans.
Autom. Control 19, 716 (1974); G. Schwarz, Ann. Stat. 6, 461 (1978); bibliographic details from memory); only differences
between models fitted to the same data and weights mean anything.
"""

from __future__ import annotations

import numpy as np

#: chi2 is floored at n*(ROUNDOFF*typical weighted value)^2 so noise-free data give finite AIC
ROUNDOFF = 1e-13


def information_criteria(chi2: float, n: int, k: int, scale: float) -> tuple[float, float]:
    """(AIC, BIC); `scale` is a typical |C*w| so the round-off floor has the data's units."""
    floor = n * (ROUNDOFF * scale) ** 2
    term = n * np.log(max(chi2, floor) / n)
    return float(term + 2 * k), float(term + k * np.log(n))


def residual_stats(C_F, C_model_F, C_ref_F: float) -> dict[str, float]:
    """R^2 (unweighted), RMS and largest |residual|, both in percent of C_ref (C at 0 V)."""
    C = np.asarray(C_F, dtype=float)
    r = C - np.asarray(C_model_F, dtype=float)
    ss_tot = float(np.sum((C - C.mean()) ** 2))
    r2 = 1.0 - float(np.sum(r**2)) / ss_tot if ss_tot > 0 else float("nan")
    return {
        "r2": r2,
        "rms_pct_C0": 100.0 * float(np.sqrt(np.mean(r**2))) / C_ref_F,
        "max_resid_pct_C0": 100.0 * float(np.max(np.abs(r))) / C_ref_F,
    }


def covariance_scale(chi2_red: float, weighted: bool) -> float:
    """Factor applied to the unscaled covariance (J^T W J)^-1.

    Unweighted fits have no noise level but the residuals, so the factor is chi2_red
    (lmfit's scale_covar=True). Weighted fits trust sigma but never claim more precision
    than the scatter shows: factor = max(1, chi2_red), the Birge-ratio rule used when
    combining measurements (R. T. Birge, Phys. Rev. 40, 207 (1932), details from memory; the Particle Data
    Group applies its scale factor only when it exceeds 1) [common practice]. A misfitting model
    (chi2_red >> 1) so widens its own error bars instead of hiding the misfit.
    """
    if not weighted:
        return float(chi2_red)
    return float(max(1.0, chi2_red))
