"""Does the fitted law describe the data? Lack-of-fit tests, the model-error term, turns.

A fit whose residuals are structured, or whose chi-square is far above what the stated noise
allows, does not describe the data: its parameter band alone then understates how far the
curve can be from the part. Such a fit says so (stats "describes_data" false, a verdict line
in the report and the CLI) and carries a model-error term s_m in its band:
u_C(V)^2 = J Sigma J^T + s_m^2.

Tests, both on residuals ordered by bias:
- chi-square against its expectation (weighted fits only, sigma known): p = P(chi2_dof >= chi2);
- the Wald-Wolfowitz runs test on the residual signs: too few runs = structure
  (A. Wald and J. Wolfowitz, Ann. Math. Stat. 11, 147 (1940); normal approximation with a
  continuity correction [published: standard nonparametric statistics texts]).
Lack of fit: p_chi2 < 0.001, or too few runs (p_runs < 0.01) together with p_chi2 < 0.05; an
unweighted fit (no noise level known) relies on the runs test alone.

The model-error term: weighted, s_m solves sum r_i^2/(sigma_i^2 + s_m^2) = n - k (the extra
per-point variance that makes chi-square meet its expectation); unweighted, s_m is the
residual standard deviation.
"""

from __future__ import annotations

import numpy as np
from scipy.special import chdtrc, ndtr

P_CHI2_ALONE = 1e-3
P_RUNS = 1e-2
P_CHI2_WITH_RUNS = 0.05


def runs_test(resid_sorted) -> tuple[int, float, float]:
    """(runs, expected runs, one-sided p of so few runs) of the signs of the residuals."""
    r = np.asarray(resid_sorted, dtype=float)
    s = np.sign(r[r != 0.0])
    n1, n2 = int(np.sum(s > 0)), int(np.sum(s < 0))
    if n1 == 0 or n2 == 0:
        return (1 if s.size else 0), 1.0, (1.0 if s.size < 2 else 0.5 ** (s.size - 1))
    runs = 1 + int(np.sum(s[1:] != s[:-1]))
    n = n1 + n2
    mu = 2.0 * n1 * n2 / n + 1.0
    var = 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * (n - 1.0))
    if var <= 0:
        return runs, mu, 1.0
    z = (runs - mu + 0.5) / np.sqrt(var)
    return runs, float(mu), float(ndtr(z))


def model_error(resid_F, sigma_F, dof: int) -> float:
    """s_m in farads (see the module docstring); 0 when chi-square is within expectation."""
    r = np.asarray(resid_F, dtype=float)
    if dof <= 0:
        return 0.0
    if sigma_F is None:
        return float(np.sqrt(np.sum(r * r) / dof))
    s2 = np.asarray(sigma_F, dtype=float) ** 2

    def excess(m2):
        return float(np.sum(r * r / (s2 + m2))) - dof

    if excess(0.0) <= 0:
        return 0.0
    lo, hi = 0.0, float(np.max(r * r)) + float(np.max(s2))
    while excess(hi) > 0:
        hi *= 4.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if excess(mid) > 0:
            lo = mid
        else:
            hi = mid
        if hi - lo <= 1e-9 * hi:
            break
    return float(np.sqrt(hi))


def assess(bias_V, resid_F, sigma_F, dof: int) -> dict:
    """Lack-of-fit statistics of one branch's residuals (model_error gives the term)."""
    V = np.asarray(bias_V, dtype=float)
    r = np.asarray(resid_F, dtype=float)
    order = np.argsort(V, kind="stable")
    runs, runs_exp, p_runs = runs_test(r[order])
    out = {"runs": runs, "runs_expected": runs_exp, "runs_p": p_runs, "chi2_p": None}
    if sigma_F is not None and dof > 0:
        chi2 = float(np.sum((r / np.asarray(sigma_F, dtype=float)) ** 2))
        p_chi2 = float(chdtrc(dof, chi2))
        out["chi2_p"] = p_chi2
        lack = p_chi2 < P_CHI2_ALONE or (p_runs < P_RUNS and p_chi2 < P_CHI2_WITH_RUNS)
    else:
        lack = p_runs < P_RUNS
    out["describes_data"] = not lack
    return out


def turns(C_on_grid, tol_F: float = 0.0, rel_tol: float = 1e-9) -> int:
    """Turns of a curve sampled on a fine grid: changes of direction after the curve has
    moved by more than tol_F (farads) from its last extreme. With tol_F = 2 sigma a ripple
    the data could not see (inside their noise) is not a turn; a swing larger than that is."""
    C = np.asarray(C_on_grid, dtype=float)
    tol = max(float(tol_F), rel_tol * float(np.max(np.abs(C)) or 1.0))
    return _zigzag(C, np.full(C.size, tol))


def _zigzag(values, tol) -> int:
    """Direction changes of a sequence, a move counting once it exceeds tol from the last
    extreme (tol per element: the larger of the two elements' tolerances applies)."""
    n = len(values)
    values, tol = np.asarray(values, dtype=float).tolist(), np.asarray(tol, dtype=float).tolist()
    count, direction = 0, 0  # (Python floats: the walk is element by element)
    ext = 0  # index of the last extreme
    for j in range(1, n):
        step = values[j] - values[ext]
        if direction >= 0 and values[j] >= values[ext]:
            if direction == 0 and step > max(tol[j], tol[ext]):
                direction = 1
            if direction == 1:
                ext = j
                continue
        if direction <= 0 and values[j] <= values[ext]:
            if direction == 0 and -step > max(tol[j], tol[ext]):
                direction = -1
            if direction == -1:
                ext = j
                continue
        if direction != 0 and abs(step) > max(tol[j], tol[ext]):
            count += 1
            direction = -direction
            ext = j
    return count


def data_turns(bias_V, C_F, sigma_F) -> int:
    """Turns the data themselves show: the means at each bias, walked up in bias, change
    direction after moving more than twice their standard deviation from the last extreme.
    Without sigma every change counts (nothing lets a turn be called noise)."""
    V = np.asarray(bias_V, dtype=float)
    C = np.asarray(C_F, dtype=float)
    distinct, inv = np.unique(V, return_inverse=True)
    counts = np.bincount(inv)
    means = np.bincount(inv, weights=C) / counts
    if sigma_F is None:
        u = np.zeros_like(means)
    else:
        u = np.sqrt(np.bincount(inv, weights=np.asarray(sigma_F, dtype=float) ** 2)) / counts
    return _zigzag(means, 2.0 * u)
