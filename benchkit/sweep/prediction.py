"""Predict the settled reading from the transient, with the prediction's uncertainty.

Why: after a bias step a class-2 part relaxes towards its settled value for seconds to
minutes (dielectric absorption [common practice]; a fast reversible drop, then a slower
one [published: T. Tsurumi et al., J. Electroceram. 21, 17 (2008)]). Waiting until the drift
has died away costs several relaxation times per point. Fitting the relaxation and reading
its end off the fit costs about one, or less once the time constant is known.

Model. At a constant bias the reading follows C(t) = C_inf + A*exp(-(t - t1)/tau) (t1 the
first reading of the fit). The time constant is a property of the dielectric, not of the
step [common practice: a dielectric's relaxation time does not depend on the step that
excites it, linear response], so the steps of one sample share it: the sample's earlier
transients pin tau down and a later step only has to fix C_inf and A, which is a linear
least-squares fit. Tau is profiled on a log grid (RELAX_TAU_GRID points from min_tau_s to
the plan's max_tau_s; settle.py sets min_tau_s to a quarter of min_dwell_s: a relaxation
faster than that has spent 98 % of itself before the first reading the fit uses, so it
cannot be told from a settled reading, and letting it in lets one noisy first reading pass
for a transient): chi2(tau) = SSR(tau)/s^2 summed over the sample's
transients, s^2 the scatter of one reading in each (the larger of the fit's and the
successive-difference estimate [published: J. von Neumann, Ann. Math. Stat. 12, 367 (1941)]).
The taus kept are those within DCHI2 = 1 of the best (profile-likelihood one-standard-error
interval [published: standard likelihood theory, Wilks]), widened by the Birge ratio
chi2_min/dof when the law does not quite fit [published: R. T. Birge, Phys. Rev. 40, 207
(1932)], and by one grid step each side (the grid cannot resolve more).

Prediction and its uncertainty. C_inf at the best tau; its standard uncertainty is the fit's
own (s^2 times the (0, 0) element of (X^T X)^-1 at the best tau, times the Birge ratio)
added in quadrature to half the spread of C_inf over the kept taus (what not knowing tau
better costs). A tau range that reaches max_tau_s means the data cannot tell the transient
from a slower one: the prediction then carries the spread up to max_tau_s, the slowest
relaxation the plan says is worth chasing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

RELAX_TAU_MIN_S = 0.05  # below this the charging through the fixture dominates anyway
RELAX_TAU_GRID = 96  # log grid: neighbours differ by about 7 % over 0.05 .. 20 s
DCHI2 = 9.0  # three-standard-error profile interval (the rule is checked at every reading, and a
# narrower one of a nonlinear parameter from a few readings misses the slow alternative too
# often); its farther end counts as 3 sigma
MIN_PREDICT_READINGS = 5  # 2 linear parameters with tau known; a few more to see the noise


@dataclass(frozen=True)
class Prediction:
    """The settled value predicted from one transient, and what it rests on."""

    C_inf_F: float
    u_C_inf_F: float  # standard uncertainty (k = 1)
    tau_s: float  # best time constant (profile over the sample's transients)
    tau_lo_s: float
    tau_hi_s: float
    amplitude_F: float  # A at the first reading of the fit (C - C_inf there)
    n_readings: int
    span_s: float

    @property
    def u_pct(self) -> float:
        """u(C_inf) in percent of C_inf."""
        return 100.0 * self.u_C_inf_F / self.C_inf_F


def tau_grid(max_tau_s: float, min_tau_s: float = RELAX_TAU_MIN_S) -> np.ndarray:
    lo = max(min_tau_s, RELAX_TAU_MIN_S)
    return np.geomspace(lo, max(max_tau_s, 2 * lo), RELAX_TAU_GRID)


def _linear_fits(t, y, taus):
    """For each tau: (C_inf, A, SSR, (X^T X)^-1 [0, 0]) of y = C_inf + A*exp(-(t - t0)/tau)."""
    x = np.exp(-np.outer(1.0 / taus, t - t[0]))  # (ntau, n)
    n = float(t.size)
    sx = x.sum(axis=1)
    sxx = (x * x).sum(axis=1)
    sy = float(y.sum())
    sxy = x @ y
    det = n * sxx - sx * sx
    ok = det > 1e-12 * n * np.maximum(sxx, 1e-300)
    det = np.where(ok, det, np.nan)
    A = (n * sxy - sx * sy) / det
    c = (sy - A * sx) / n
    r = y[None, :] - c[:, None] - A[:, None] * x
    ssr = (r * r).sum(axis=1)
    return c, A, np.where(ok, ssr, np.inf), sxx / det, ok


def noise_variance(t, y, ssr_min: float) -> float:
    """Scatter of one reading: the larger of the fit's and the successive-difference one."""
    dof = max(t.size - 3, 1)
    return max(ssr_min / dof, float(np.mean(np.diff(y) ** 2)) / 2.0, 1e-300)


class TauProfile:
    """chi2(tau) summed over the transients of one sample (see the module docstring)."""

    def __init__(self, max_tau_s: float, min_tau_s: float = RELAX_TAU_MIN_S):
        self.taus = tau_grid(max_tau_s, min_tau_s)
        self.chi2 = np.zeros(self.taus.size)
        self.dof = 0
        self.n_transients = 0

    def transient_chi2(self, t_s, C_F):
        """(chi2 over the grid, dof, fits) of one transient on its own."""
        t = np.asarray(t_s, dtype=float)
        c = np.asarray(C_F, dtype=float)
        scale = float(np.mean(c))
        y = c / scale - 1.0
        cinf, A, ssr, v00, ok = _linear_fits(t, y, self.taus)
        if not ok.any():
            raise ValueError("a relaxation fit needs readings spread over time")
        var = noise_variance(t, y, float(np.min(ssr)))
        return ssr / var, t.size - 2, (scale, cinf, A, v00, var)

    def add(self, t_s, C_F) -> None:
        """Add a finished transient (the point's readings) to the sample's profile."""
        if len(t_s) < MIN_PREDICT_READINGS or np.ptp(t_s) <= 0:
            return
        chi2, dof, _ = self.transient_chi2(t_s, C_F)
        self.chi2 = self.chi2 + np.where(np.isfinite(chi2), chi2, np.nanmax(chi2[np.isfinite(chi2)]))
        self.dof += dof
        self.n_transients += 1

    def predict(self, t_s, C_F) -> Prediction:
        """The settled value of this transient, with the sample's earlier ones for tau."""
        t = np.asarray(t_s, dtype=float)
        c = np.asarray(C_F, dtype=float)
        if t.size != c.size or t.size < MIN_PREDICT_READINGS or np.ptp(t) <= 0:
            raise ValueError(f"a prediction needs {MIN_PREDICT_READINGS} or more readings "
                             "spread over time")
        chi2, dof, (scale, cinf, A, v00, var) = self.transient_chi2(t, c)
        total = self.chi2 + chi2
        total = np.where(np.isfinite(total), total, np.inf)
        i = int(np.argmin(total))
        dof_all = self.dof + dof - 1
        birge = max(1.0, float(total[i]) / dof_all) if dof_all > 0 else 1.0
        kept = np.flatnonzero(total <= total[i] + DCHI2 * birge)
        lo, hi = max(int(kept.min()) - 1, 0), min(int(kept.max()) + 1, self.taus.size - 1)
        span_c = cinf[lo:hi + 1][np.isfinite(cinf[lo:hi + 1])]
        # the farther end of the two-sigma range, halved: C_inf(tau) is far from linear (it
        # grows about as slope*tau for a slow one), so the range is lopsided
        u_tau = float(np.max(np.abs(span_c - cinf[i]))) / 3.0 if span_c.size else math.inf
        u_fit = math.sqrt(max(var * float(v00[i]) * birge, 0.0))
        u = math.hypot(u_fit, u_tau)
        return Prediction(scale * (1.0 + float(cinf[i])), scale * u, float(self.taus[i]),
                          float(self.taus[lo]), float(self.taus[hi]), scale * float(A[i]),
                          int(t.size), float(np.ptp(t)))


def predict_settled(t_s, C_F, max_tau_s: float = 20.0,
                    min_tau_s: float = RELAX_TAU_MIN_S) -> Prediction:
    """One transient on its own (no earlier steps to share tau with)."""
    return TauProfile(max_tau_s, min_tau_s).predict(t_s, C_F)


__all__ = ["Prediction", "TauProfile", "predict_settled", "tau_grid", "MIN_PREDICT_READINGS",
           "RELAX_TAU_MIN_S", "RELAX_TAU_GRID"]
