"""Wideband model of a capacitor at each bias: Z(f) from 100 Hz to beyond self-resonance.

Equivalent circuit (series model, impedance-measurement handbook relations):

    Z(f) = esr_ohm + j*w*esl_H + Z_diel(f),   Z_diel = 1/(w*C(f)*(D + j))
    C(f) = C_F * (f/f_ref_Hz)^(-(2/pi)*atan(D))

The dielectric is a constant-phase element: a loss tangent D that does not change with
frequency forces C to fall slowly with frequency (the "universal" dielectric response,
A. K. Jonscher, Dielectric Relaxation in Solids, 1983 [from memory]); Z_diel = 1/(Y0*(j*w)^n)
with n = 1 - (2/pi)*atan(D) [derived]. So ESR(f) = Re Z = esr_ohm + D/(w*C(f)*(1 + D^2)) rises
toward low frequency above the conductor floor esr_ohm, and the part resonates where Im Z = 0,
near f_srf = 1/(2*pi*sqrt(esl_H*C)) [published: impedance-measurement handbook relations].

Fitting: lmfit (Levenberg-Marquardt) on the real and imaginary parts of the complex relative
residual (Z_model - Z)/|Z|, so every frequency weighs alike whatever |Z| is (a meter's
accuracy is specified in percent of |Z| [common practice]). Parameters are fitted in scaled
units (C and L divided by their starting values) to keep the problem well conditioned.
Uncertainties: the covariance from the jacobian, scaled by the reduced chi-square (the scatter
about the model sets the error bars) unless the caller gives sigma_rel.

A WidebandModel holds one fit per bias; between two fitted biases the parameters are
interpolated linearly (stated in `interpolated`), never extrapolated beyond them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from fits.errors import CurveDocumentError, FitError, OutOfRange

MODEL = "series-cpe-rl"
PARAM_NAMES = ("C_F", "D", "esr_ohm", "esl_H")
DEFAULT_F_REF_HZ = 1e3
MIN_POINTS = 6
BIAS_TOL_V = 1e-6


def impedance_ohm(freq_Hz, C_F: float, D: float, esr_ohm: float, esl_H: float,
                  f_ref_Hz: float = DEFAULT_F_REF_HZ):
    """Z(f) of the equivalent circuit (module docstring); complex, same shape as freq_Hz."""
    f = np.asarray(freq_Hz, dtype=float)
    w = 2.0 * np.pi * f
    C = C_F * (f / f_ref_Hz) ** (-(2.0 / np.pi) * np.arctan(D))
    Z = esr_ohm + 1j * w * esl_H + 1.0 / (w * C * (D + 1j))
    return complex(Z) if np.ndim(freq_Hz) == 0 else Z


@dataclass(frozen=True)
class WidebandFit:
    """The equivalent circuit at one bias, its covariance and how well it fits."""

    bias_V: float
    params: Mapping[str, float]
    covariance: np.ndarray
    freq_range_Hz: tuple[float, float]
    f_ref_Hz: float = DEFAULT_F_REF_HZ
    stats: Mapping[str, float] = field(default_factory=dict)
    interpolated: bool = False

    # -- evaluation ------------------------------------------------------------------------
    def _vector(self) -> np.ndarray:
        return np.array([self.params[n] for n in PARAM_NAMES], dtype=float)

    def Z(self, freq_Hz):
        """Complex impedance in ohms."""
        return impedance_ohm(freq_Hz, f_ref_Hz=self.f_ref_Hz, **self.params)

    def Z_abs(self, freq_Hz):
        return np.abs(self.Z(freq_Hz)) if np.ndim(freq_Hz) else abs(self.Z(freq_Hz))

    def esr_ohm(self, freq_Hz):
        """ESR(f) = Re Z (conductor floor plus the dielectric part)."""
        return np.real(self.Z(freq_Hz)) if np.ndim(freq_Hz) else self.Z(freq_Hz).real

    @property
    def esl_H(self) -> float:
        return float(self.params["esl_H"])

    def C_F(self, freq_Hz):
        """Capacitance of the dielectric at f: C(f) = C_F*(f/f_ref)^(-(2/pi)*atan D).

        This is the part's own C, free of the resonance; the apparent -1/(w*Im Z) of a meter
        diverges near self-resonance (see C_apparent_F)."""
        f = np.asarray(freq_Hz, dtype=float)
        out = self.params["C_F"] * (f / self.f_ref_Hz) ** (-(2.0 / np.pi) * np.arctan(self.params["D"]))
        return float(out) if np.ndim(freq_Hz) == 0 else out

    def C_apparent_F(self, freq_Hz):
        """-1/(w*Im Z): what a series-C reading shows (negative above resonance)."""
        w = 2.0 * np.pi * np.asarray(freq_Hz, dtype=float)
        out = -1.0 / (w * np.imag(self.Z(freq_Hz)))
        return float(out) if np.ndim(freq_Hz) == 0 else out

    def srf_Hz(self) -> float:
        """Self-resonant frequency: where Im Z crosses zero (the phase crosses 0)."""
        return _srf(self._vector(), self.f_ref_Hz)

    # -- uncertainty (delta method, numerical jacobian) ------------------------------------
    def _u(self, fn) -> float:
        p = self._vector()
        base = fn(p)
        J = np.zeros(p.size)
        for i in range(p.size):
            h = 1e-6 * (abs(p[i]) or 1e-12)
            q = np.array(p, dtype=float)
            q[i] += h
            J[i] = (fn(q) - base) / h
        return float(math.sqrt(max(J @ self.covariance @ J, 0.0)))

    def u_Z_abs(self, freq_Hz: float) -> float:
        """Standard uncertainty of |Z| at one frequency from the parameter covariance."""
        return self._u(lambda p: abs(impedance_ohm(float(freq_Hz), *p, f_ref_Hz=self.f_ref_Hz)))

    def u_esr(self, freq_Hz: float) -> float:
        return self._u(lambda p: impedance_ohm(float(freq_Hz), *p, f_ref_Hz=self.f_ref_Hz).real)

    def u_srf(self) -> float:
        return self._u(lambda p: _srf(p, self.f_ref_Hz))

    @property
    def stderr(self) -> dict[str, float]:
        d = np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))
        return dict(zip(PARAM_NAMES, (float(x) for x in d)))

    def to_dict(self) -> dict:
        return {"bias_V": float(self.bias_V),
                "params": {n: float(self.params[n]) for n in PARAM_NAMES},
                "covariance": np.asarray(self.covariance, dtype=float).tolist(),
                "freq_range_Hz": [float(x) for x in self.freq_range_Hz],
                "stats": {k: (float(v) if v is not None and math.isfinite(float(v)) else None)
                          for k, v in self.stats.items()}}


def _srf(p: np.ndarray, f_ref_Hz: float) -> float:
    from scipy.optimize import brentq

    C, D, R, L = (float(x) for x in p)
    if not (L > 0 and C > 0):
        return math.inf
    guess = 1.0 / (2.0 * math.pi * math.sqrt(L * C))

    def im(logf):
        return impedance_ohm(10.0 ** logf, C, D, R, L, f_ref_Hz).imag

    lo, hi = math.log10(guess) - 1.0, math.log10(guess) + 1.0
    for _ in range(20):
        if im(lo) < 0 < im(hi):
            break
        lo, hi = lo - 1.0, hi + 1.0
    else:
        return math.nan
    return 10.0 ** brentq(im, lo, hi, xtol=1e-13, rtol=1e-14)


# --- fitting --------------------------------------------------------------------------------

def _start(f: np.ndarray, Z: np.ndarray, f_ref_Hz: float) -> dict[str, float]:
    """Starting values from the data: C from the lowest frequencies, D from the phase there,
    the floor from the smallest resistance, L from the highest frequencies or the resonance."""
    w = 2.0 * np.pi * f
    i0 = int(np.argmin(f))
    C0 = -1.0 / (w[i0] * Z[i0].imag) if Z[i0].imag < 0 else 1.0 / (w[i0] * abs(Z[i0]))
    D0 = float(np.clip(Z[i0].real / max(-Z[i0].imag, 1e-300), 1e-4, 0.5))
    C0 = C0 * (f[i0] / f_ref_Hz) ** ((2.0 / np.pi) * math.atan(D0))  # refer it to f_ref
    R0 = float(max(np.min(Z.real), 1e-6))
    ind = Z.imag > 0
    if ind.any():
        j = int(np.argmax(np.where(ind, f, -1.0)))
        L0 = (Z[j].imag + 1.0 / (w[j] * C0)) / w[j]
    else:  # no inductive point: an ESL that puts resonance a decade above the top
        L0 = 1.0 / ((2 * np.pi * 10 * f.max()) ** 2 * C0)
    return {"C_F": float(C0), "D": D0, "esr_ohm": R0, "esl_H": float(max(L0, 1e-15))}


def fit_impedance(freq_Hz: Sequence[float], Z_ohm: Sequence[complex], *, bias_V: float = 0.0,
                  f_ref_Hz: float = DEFAULT_F_REF_HZ,
                  sigma_rel: float | Sequence[float] | None = None) -> WidebandFit:
    """Fit the equivalent circuit to Z(f) at one bias with lmfit; FitError if it cannot."""
    import lmfit

    f = np.asarray(freq_Hz, dtype=float).ravel()
    Z = np.asarray(Z_ohm, dtype=complex).ravel()
    if f.size != Z.size:
        raise FitError(f"bias {bias_V:g} V: {f.size} frequencies but {Z.size} impedances")
    if f.size < MIN_POINTS:
        raise FitError(f"bias {bias_V:g} V: {f.size} frequencies; a wideband fit needs "
                       f"at least {MIN_POINTS}")
    if not (np.all(np.isfinite(f)) and np.all(f > 0) and np.all(np.isfinite(Z))):
        raise FitError(f"bias {bias_V:g} V: frequencies must be > 0 Hz and impedances finite")
    if len(np.unique(f)) < MIN_POINTS:
        raise FitError(f"bias {bias_V:g} V: fewer than {MIN_POINTS} distinct frequencies")
    order = np.argsort(f)
    f, Z = f[order], Z[order]
    sig = np.ones_like(f) if sigma_rel is None else np.broadcast_to(
        np.asarray(sigma_rel, dtype=float), f.shape)[order]
    if not np.all(sig > 0):
        raise FitError(f"bias {bias_V:g} V: sigma_rel must be > 0")
    g = _start(f, Z, f_ref_Hz)
    scale = {"C_F": g["C_F"], "esl_H": g["esl_H"], "esr_ohm": max(g["esr_ohm"], 1e-6)}
    pars = lmfit.Parameters()
    pars.add("c", value=1.0, min=1e-6)
    pars.add("D", value=g["D"], min=0.0, max=1.0)
    pars.add("r", value=1.0, min=0.0)
    pars.add("l", value=1.0, min=0.0)
    absZ = np.abs(Z)

    def unpack(v):
        return (v["c"] * scale["C_F"], v["D"], v["r"] * scale["esr_ohm"], v["l"] * scale["esl_H"])

    def residual(p):
        v = p.valuesdict()
        e = (impedance_ohm(f, *unpack(v), f_ref_Hz) - Z) / (absZ * sig)
        return np.concatenate([e.real, e.imag])

    result = lmfit.minimize(residual, pars, method="leastsq", scale_covar=sigma_rel is None,
                            max_nfev=4000)
    v = result.params.valuesdict()
    C, D, R, L = unpack(v)
    if not all(math.isfinite(x) for x in (C, D, R, L)) or C <= 0:
        raise FitError(f"bias {bias_V:g} V: the wideband fit did not converge "
                       f"({result.message})")
    k = np.diag([scale["C_F"], 1.0, scale["esr_ohm"], scale["esl_H"]])
    names = ["c", "D", "r", "l"]
    cov = np.zeros((4, 4))
    if result.covar is not None:
        idx = [names.index(n) for n in result.var_names]
        cov[np.ix_(idx, idx)] = result.covar
    cov = k @ cov @ k
    rel = np.abs(impedance_ohm(f, C, D, R, L, f_ref_Hz) - Z) / absZ
    stats = {"n_points": float(f.size), "rms_rel": float(np.sqrt(np.mean(rel**2))),
             "max_rel": float(rel.max()), "redchi": float(result.redchi),
             "covariance_ok": 1.0 if result.covar is not None else 0.0}
    params = {"C_F": float(C), "D": float(D), "esr_ohm": float(R), "esl_H": float(L)}
    return WidebandFit(float(bias_V), params, cov,
                       (float(f[0]), float(f[-1])), float(f_ref_Hz), stats)


# --- all biases -----------------------------------------------------------------------------

class WidebandModel:
    """One WidebandFit per bias; what a curve document carries under "wideband"."""

    def __init__(self, fits: Sequence[WidebandFit], *, conditions: Mapping | None = None):
        if not fits:
            raise FitError("a wideband model needs at least one bias")
        self.fits = sorted(fits, key=lambda x: x.bias_V)
        b = [x.bias_V for x in self.fits]
        if any(b2 - b1 <= BIAS_TOL_V for b1, b2 in zip(b, b[1:])):
            raise FitError("a wideband model has one fit per bias; a bias appears twice")
        self.conditions = dict(conditions or {})

    @property
    def biases_V(self) -> list[float]:
        return [x.bias_V for x in self.fits]

    def at(self, bias_V: float) -> WidebandFit:
        """The fit at this bias; linear in the parameters between two fitted biases."""
        V = float(bias_V)
        for x in self.fits:
            if abs(x.bias_V - V) <= BIAS_TOL_V:
                return x
        lo, hi = self.fits[0].bias_V, self.fits[-1].bias_V
        if not (lo < V < hi) or not math.isfinite(V):
            raise OutOfRange(f"bias {V:g} V is outside the wideband model's biases "
                             f"{lo:g} V to {hi:g} V; it is never extrapolated")
        j = next(i for i, x in enumerate(self.fits) if x.bias_V > V)
        a, b = self.fits[j - 1], self.fits[j]
        t = (V - a.bias_V) / (b.bias_V - a.bias_V)
        params = {n: (1 - t) * a.params[n] + t * b.params[n] for n in PARAM_NAMES}
        cov = (1 - t) ** 2 * a.covariance + t**2 * b.covariance
        rng = (max(a.freq_range_Hz[0], b.freq_range_Hz[0]), min(a.freq_range_Hz[1], b.freq_range_Hz[1]))
        return WidebandFit(V, params, cov, rng, a.f_ref_Hz, {}, interpolated=True)

    def to_dict(self) -> dict:
        return {"model": MODEL, "param_names": list(PARAM_NAMES),
                "f_ref_Hz": float(self.fits[0].f_ref_Hz),
                "conditions": dict(self.conditions),
                "biases": [x.to_dict() for x in self.fits]}

    @classmethod
    def from_dict(cls, d, where: str = "curve document") -> "WidebandModel":
        fits, conditions = check_wideband(d, where)
        return cls(fits, conditions=conditions)


def fit_wideband(bias_V: Sequence[float], freq_Hz: Sequence[float], Z_ohm: Sequence[complex], *,
                 f_ref_Hz: float = DEFAULT_F_REF_HZ, conditions: Mapping | None = None,
                 sigma_rel=None) -> WidebandModel:
    """Group (bias, frequency, Z) rows by bias and fit each group."""
    V = np.asarray(bias_V, dtype=float).ravel()
    f = np.asarray(freq_Hz, dtype=float).ravel()
    Z = np.asarray(Z_ohm, dtype=complex).ravel()
    if not (V.size == f.size == Z.size):
        raise FitError("bias_V, freq_Hz and Z_ohm must have the same length")
    keys = np.round(V / BIAS_TOL_V) * BIAS_TOL_V
    out = []
    for k in np.unique(keys):
        m = keys == k
        s = None if sigma_rel is None else np.broadcast_to(np.asarray(sigma_rel, float), V.shape)[m]
        out.append(fit_impedance(f[m], Z[m], bias_V=float(np.mean(V[m])), f_ref_Hz=f_ref_Hz,
                                 sigma_rel=s))
    return WidebandModel(out, conditions=conditions)


# --- document checks ------------------------------------------------------------------------

def _bad(where: str, field_: str, problem: str):
    raise CurveDocumentError(f"{where}: field '{field_}': {problem}")


def _num(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(float(x))


def check_wideband(d, where: str):
    """([WidebandFit], conditions) from the document's "wideband" object, or
    CurveDocumentError naming the field."""
    if not isinstance(d, Mapping):
        _bad(where, "wideband", "must be an object")
    if d.get("model") != MODEL:
        _bad(where, "wideband.model", f"expected '{MODEL}', got {d.get('model')!r}")
    if list(d.get("param_names") or []) != list(PARAM_NAMES):
        _bad(where, "wideband.param_names", f"must be {list(PARAM_NAMES)}")
    f_ref = d.get("f_ref_Hz", DEFAULT_F_REF_HZ)
    if not _num(f_ref) or f_ref <= 0:
        _bad(where, "wideband.f_ref_Hz", f"must be a frequency > 0 Hz, got {f_ref!r}")
    cond = d.get("conditions") or {}
    if not isinstance(cond, Mapping):
        _bad(where, "wideband.conditions", "must be an object")
    rows = d.get("biases")
    if not isinstance(rows, list) or not rows:
        _bad(where, "wideband.biases", "must be a non-empty list of per-bias fits")
    fits = []
    for i, r in enumerate(rows):
        at = f"wideband.biases[{i}]"
        if not isinstance(r, Mapping):
            _bad(where, at, "must be an object")
        if not _num(r.get("bias_V")):
            _bad(where, at + ".bias_V", "must be a number of volts")
        p = r.get("params")
        if not isinstance(p, Mapping) or sorted(p) != sorted(PARAM_NAMES):
            _bad(where, at + ".params", f"must hold exactly {', '.join(PARAM_NAMES)}")
        for n in PARAM_NAMES:
            if not _num(p[n]) or p[n] < 0 or (n == "C_F" and p[n] <= 0):
                _bad(where, f"{at}.params.{n}", f"must be a finite number >= 0 (C_F > 0), got {p[n]!r}")
        cov = r.get("covariance")
        if (not isinstance(cov, list) or len(cov) != 4
                or not all(isinstance(row, list) and len(row) == 4 and all(_num(x) for x in row)
                           for row in cov)):
            _bad(where, at + ".covariance", "must be a 4x4 matrix of finite numbers")
        fr = r.get("freq_range_Hz")
        if (not isinstance(fr, list) or len(fr) != 2 or not all(_num(x) for x in fr)
                or not 0 < fr[0] < fr[1]):
            _bad(where, at + ".freq_range_Hz", "must be [low, high] in Hz with 0 < low < high")
        stats = r.get("stats") or {}
        if not isinstance(stats, Mapping):
            _bad(where, at + ".stats", "must be an object")
        fits.append(WidebandFit(float(r["bias_V"]), {n: float(p[n]) for n in PARAM_NAMES},
                                np.array(cov, dtype=float), (float(fr[0]), float(fr[1])),
                                float(f_ref), {k: v for k, v in stats.items() if _num(v)}))
    try:
        WidebandModel(fits)
    except FitError as exc:
        _bad(where, "wideband.biases", str(exc))
    return fits, dict(cond)
