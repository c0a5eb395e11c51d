"""The least-squares engine: MINPACK Levenberg-Marquardt with simple bounds.

Every fit in fits goes through `solve` (the C(V) models and the NIST StRD checks of
tests/fits/test_strd.py alike), so the engine that is checked against certified values is the
one that fits sweeps.

Why MINPACK's lmder through scipy.optimize.leastsq and not lmfit's wrapper of it: the same
algorithm, but without lmfit's per-evaluation parameter objects, which cost about ten times
the solve itself on a 41-point sweep (measured: 5 ms against 0.45 ms for one tanh fit).

Bounds. MINPACK knows none. The residual is evaluated at the parameters clipped into their
bounds (a clipped parameter's jacobian column is zero, so the step cannot push it further);
when the solve ends with a parameter on or beyond a bound it is held there and the others are
solved again. This is the active-set idea of bounded least squares in its simplest form: a
parameter that the data push against a physical limit (a capacitance below 0) ends on the
limit and is reported as held, with no standard error.

Polish. After MINPACK's stop, Gauss-Newton steps are taken while they contract (_polish):
MINPACK's relative-reduction test can stop in a flat valley with a poorly determined
parameter still far from its optimum in digits (NIST StRD ENSO: 5.7 digits without it).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from scipy.optimize import leastsq

#: relative tolerances on the step and on the sum of squares (MINPACK xtol, ftol)
XTOL = FTOL = 1e-13
#: relative distance to a bound that counts as "on" it
BOUND_REL = 1e-7


@dataclass
class Solution:
    x: np.ndarray  # all parameters (held ones at their bound)
    held: tuple[int, ...]  # indices held on a bound
    chi2: float  # sum of squared residuals at x
    nfev: int
    ier: int
    message: str

    @property
    def converged(self) -> bool:
        """MINPACK's ier 1-4 are convergence; 6-8 say the tolerances are below what double
        precision can still improve (the optimum is reached to round-off)."""
        return self.ier in (1, 2, 3, 4, 6, 7, 8)


class SolveError(Exception):
    """The residual or jacobian went non-finite, or every parameter ended on a bound."""


def _on_bound(x, lo, hi):
    lo_f = np.where(np.isfinite(lo), lo, 0.0)
    hi_f = np.where(np.isfinite(hi), hi, 0.0)
    low = np.isfinite(lo) & (x <= lo_f + BOUND_REL * np.maximum(1.0, np.abs(lo_f)))
    high = np.isfinite(hi) & (x >= hi_f - BOUND_REL * np.maximum(1.0, np.abs(hi_f)))
    return low, high


def solve(resid: Callable[[np.ndarray], np.ndarray], jac: Callable[[np.ndarray], np.ndarray] | None,
          x0: Sequence[float], lower=None, upper=None, *, fixed: Sequence[int] = (),
          max_nfev: int = 2000, xtol: float = XTOL, ftol: float = FTOL,
          hold_outward: bool = False) -> Solution:
    """Minimise sum(resid(x)**2) from x0, holding `fixed` indices and respecting bounds.

    resid(x) -> residual vector for the full parameter vector x; jac(x) -> d resid / d x of
    shape (n_residuals, len(x)), or None for MINPACK's forward differences.
    hold_outward: x0 is the optimum of a more constrained problem (a simpler variant); a
    parameter on a bound there whose gradient points outwards is held from the start.
    """
    x = np.array(x0, dtype=float)
    k = x.size
    lo = np.full(k, -np.inf) if lower is None else np.asarray(lower, dtype=float)
    hi = np.full(k, np.inf) if upper is None else np.asarray(upper, dtype=float)
    x = np.clip(x, lo, hi)
    held: list[int] = []
    free = [i for i in range(k) if i not in set(fixed)]
    nfev_total = 0
    if hold_outward and jac is not None:
        # a parameter that starts on a bound with the gradient pushing it outwards (the
        # Karush-Kuhn-Tucker sign) is held from the start: it would only run onto it again
        low, high = _on_bound(x, lo, hi)
        if np.any(low | high):
            r0 = resid(x)
            g = np.asarray(jac(x), dtype=float).T @ r0  # half the gradient of sum r^2
            for i in list(free):
                if (low[i] and g[i] > 0) or (high[i] and g[i] < 0):
                    held.append(i)
                    free.remove(i)
    while True:
        if not free:
            raise SolveError("every parameter ran onto a bound")
        idx = np.array(free)
        base = np.array(x)

        lo_i, hi_i = lo[idx], hi[idx]

        def full(p):
            y = np.array(base)
            y[idx] = np.minimum(np.maximum(p, lo_i), hi_i)
            return y, (p >= lo_i) & (p <= hi_i)

        def f(p):
            r = resid(full(p)[0])
            if not np.isfinite(r).all():
                raise SolveError("the residual is not finite at a trial step")
            return r

        Df = None
        if jac is not None:
            def Df(p):
                y, inside = full(p)
                J = np.asarray(jac(y), dtype=float)[:, idx]
                if not inside.all():
                    J = J * inside[None, :]
                if not np.isfinite(J).all():
                    raise SolveError("the jacobian is not finite at a trial step")
                return J

        p, _, info, msg, ier = leastsq(f, x[idx], Dfun=Df, full_output=True, xtol=xtol,
                                       ftol=ftol, maxfev=max_nfev)
        nfev_total += int(info["nfev"])
        r = info["fvec"]  # the residual at p
        if Df is not None and ier in (1, 2, 3, 4, 6, 7, 8):
            p, r, n_polish = _polish(f, Df, p, r, lo_i, hi_i, xtol)
            nfev_total += n_polish
        x[idx] = p
        low, high = _on_bound(x, lo, hi)
        newly = [i for i in free if low[i] or high[i]]
        clipped = np.clip(x, lo, hi)
        if not newly:
            if np.any(clipped != x):
                r = resid(clipped)
            return Solution(clipped, tuple(held), float(r @ r), nfev_total, int(ier), str(msg))
        x = clipped
        for i in newly:
            x[i] = lo[i] if low[i] else hi[i]
            held.append(i)
            free.remove(i)


def _polish(f, Df, p, r, lo, hi, xtol: float, max_steps: int = 60):
    """Gauss-Newton steps from a converged point, kept while they contract.

    Why: MINPACK stops when the relative reduction of the sum of squares falls below ftol.
    In a long flat valley of a large-residual problem (NIST StRD ENSO) that happens while a
    poorly determined parameter is still 1e-6 from the optimum: the sum of squares is
    quadratic in that error and already flat to round-off, and Gauss-Newton converges only
    linearly there. So the steps are judged by their own size, not by the sum of squares: a
    full step solved by SVD on the column-scaled jacobian is taken while each is smaller than
    the one before (the iteration contracts) and the sum of squares does not grow beyond
    round-off, until it falls below xtol of the (scaled) parameters. r is the residual at p.
    Returns (p, its residual, evaluations used).
    """
    ss = float(r @ r)
    used = 0
    prev = np.inf
    for _ in range(max_steps):
        J = Df(p)
        norms = np.sqrt(np.sum(J * J, axis=0))
        if not np.all(norms > 0):
            break
        ds, _, rank, sv = np.linalg.lstsq(J / norms, -r, rcond=None)
        if rank < J.shape[1] or sv[-1] <= 1e-12 * sv[0]:
            break  # (nearly) rank deficient: no step is determined
        step = float(np.linalg.norm(ds))
        if step <= xtol * float(np.linalg.norm(p * norms)):
            break  # converged: what is left is below the tolerance
        if not step < 0.9 * prev:
            break
        q = p + ds / norms
        if np.any(q < lo) or np.any(q > hi) or not np.all(np.isfinite(q)):
            break
        try:
            rq = f(q)
        except SolveError:
            break
        used += 1
        sq = float(rq @ rq)
        if sq > ss * (1 + 1e-13):
            break
        p, r, ss, prev = q, rq, sq, step
    return p, r, used


def lre(estimate, certified) -> np.ndarray:
    """Log relative error -log10(|estimate - certified| / |certified|), capped at 15 digits
    (NIST StRD's score of matched digits; the certified values carry 11)."""
    e = np.asarray(estimate, dtype=float)
    c = np.asarray(certified, dtype=float)
    with np.errstate(divide="ignore"):
        out = -np.log10(np.abs(e - c) / np.abs(c))
    return np.minimum(np.where(np.isfinite(out), out, 15.0), 15.0)
