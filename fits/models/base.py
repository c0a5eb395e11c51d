"""What every C(V) model provides, and the small numerical helpers the models share.

A model is a pure description of capacitance against DC bias: C(V) (what an LCR meter reads
under bias, the differential capacitance dQ/dV), its charge Q(V) with Q(0) = 0 and its stored
energy W(V) = integral of v*C(v) dv from 0 to V, plus what a fit needs (parameter hints,
starting values from the data, the jacobian) and a charge expression for SPICE.

Conventions every model keeps:
- parameter names carry their unit: `_F` capacitance, `_V` voltage;
- C is homogeneous of degree 1 in the `_F` parameters (scale every `_F` parameter by k and C
  scales by k), which lets the fitter work on data divided by its largest value;
- C, Q and W broadcast V against parameter ARRAYS by ordinary numpy rules, so the library can
  evaluate many curves in one call (V scalar with parameters of shape (M,) gives shape (M,);
  V[:, None] with parameters of shape (M,) gives (K, M)).
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np

from fits.errors import ModelError


def is_capacitance_param(name: str) -> bool:
    """True for parameters in farads (name ends in `_F`)."""
    return name.endswith("_F")


def sech2(z):
    """sech(z)**2 without overflow for large |z|: 4 e^(-2|z|) / (1 + e^(-2|z|))**2."""
    a = np.exp(-2.0 * np.abs(z))
    return 4.0 * a / (1.0 + a) ** 2


def log_cosh(z):
    """ln(cosh(z)) without overflow: |z| + ln(1 + e^(-2|z|)) - ln 2."""
    az = np.abs(z)
    return az + np.log1p(np.exp(-2.0 * az)) - np.log(2.0)


def spice_number(x: float) -> str:
    """A float as SPICE text that reads back to the same double; negatives in parentheses."""
    x = float(x)
    if not np.isfinite(x):
        raise ModelError(f"cannot write {x!r} into a SPICE expression")
    text = repr(x)
    return f"({text})" if x < 0 else text


@dataclass(frozen=True)
class Variant:
    """One parameterisation to try in a fit: a spec plus the parameters held fixed."""

    spec: "ModelSpec"
    fixed: Mapping[str, float] = field(default_factory=dict)
    label: str = ""

    @property
    def free_names(self) -> tuple[str, ...]:
        return tuple(n for n in self.spec.param_names if n not in self.fixed)


def named_function(fn: Callable, param_names, name: str) -> Callable:
    """Wrap fn(V, **params) as f(V, p1, p2, ...) with a real signature.

    lmfit reads parameter names from the signature; scipy.optimize.curve_fit passes them
    positionally. Both get the same function this way.
    """
    names = tuple(param_names)

    def f(V, *args, **kwargs):
        values = dict(zip(names, args))
        values.update(kwargs)
        return fn(V, **values)

    kind = inspect.Parameter.POSITIONAL_OR_KEYWORD
    f.__signature__ = inspect.Signature(
        [inspect.Parameter("V", kind)] + [inspect.Parameter(n, kind) for n in names]
    )
    f.__name__ = name
    f.__qualname__ = name
    return f


class ModelSpec:
    """Base of the C(V) models; subclasses fill in the maths.

    Subclasses set `name`, `title`, `param_names` and implement C, Q, W, spice_charge, hints
    and guess. `jacobian` defaults to central differences; models with a closed form set
    `analytic_jacobian = True` and override it.
    """

    name: str = ""
    title: str = ""
    param_names: tuple[str, ...] = ()
    analytic_jacobian: bool = False
    #: include in model="auto" (the table model is an interpolant, not a fitted law)
    fitted: bool = True
    #: a compact physical law (few parameters, at most one peak), preferred by model="auto"
    #: over the polynomial when it predicts unseen points as well
    compact: bool = False

    # ---- the maths -------------------------------------------------------------------
    def C(self, V, **params):
        """Differential capacitance dQ/dV in farads at bias V (volts)."""
        raise NotImplementedError

    def Q(self, V, **params):
        """Charge in coulombs, the integral of C from 0 to V (so Q(0) = 0)."""
        raise NotImplementedError

    def W(self, V, **params):
        """Stored energy in joules, integral of v*C(v) dv from 0 to V.

        Default: 64-point Gauss-Legendre on [0, V]; the built-in models give closed forms.
        """
        V = np.asarray(V, dtype=float)
        nodes, weights = np.polynomial.legendre.leggauss(64)
        total = 0.0
        for t, w in zip(nodes, weights):
            v = V * (t + 1.0) / 2.0
            total = total + w * v * self.C(v, **params)
        return total * V / 2.0

    def jacobian_of(self, V, params: Mapping[str, float], names) -> np.ndarray:
        """dC/dp for the named parameters only, columns in that order: a fit needs only its
        free columns and a band only those with a variance, and some models have costly
        columns no fit frees (the regression spline's knot biases)."""
        idx = [self.param_names.index(n) for n in names]
        return self.jacobian(V, params)[:, idx]

    def jacobian(self, V, params: Mapping[str, float]) -> np.ndarray:
        """dC/dp for each parameter, shape (len(V), len(param_names)); central differences.

        Steps are 1e-6 of the parameter (or of the typical size of its kind when it is 0).
        """
        V = np.atleast_1d(np.asarray(V, dtype=float))
        values = {n: float(params[n]) for n in self.param_names}
        cap_size = max([abs(v) for n, v in values.items() if is_capacitance_param(n)] + [1e-30])
        out = np.empty((V.size, len(self.param_names)))
        for j, n in enumerate(self.param_names):
            typical = cap_size if is_capacitance_param(n) else 1.0
            h = 1e-6 * (abs(values[n]) if values[n] != 0.0 else typical)
            up = dict(values, **{n: values[n] + h})
            dn = dict(values, **{n: values[n] - h})
            out[:, j] = (self.C(V, **up) - self.C(V, **dn)) / (2.0 * h)
        return out

    def spice_charge(self, params: Mapping[str, float], v: str) -> str:
        """SPICE (ngspice) expression of Q in coulombs in terms of the voltage expression v."""
        raise NotImplementedError

    # ---- what a fit needs ------------------------------------------------------------
    def hints(self) -> dict[str, dict]:
        """lmfit parameter hints (bounds, vary) by parameter name."""
        return {}

    def guess(self, V, C) -> dict[str, float]:
        """Starting values derived from the data."""
        raise NotImplementedError

    def data_bounds(self, V, C) -> dict[str, tuple[float, float]]:
        """Extra (min, max) limits from the data, keeping a fit of the wrong law from running
        away (e.g. a peak position far outside the sweep). None of them binds on data the
        model describes; a fit that ends on one reports the parameter as held."""
        return {}

    def variants(self, V, C) -> list[Variant]:
        """Parameterisations a fit of this data should try (one by default)."""
        return [Variant(self, {}, self.name)]

    def check_params(self, params: Mapping[str, float]) -> None:
        """Raise ValueError naming the parameter when a value is not physical."""
        for n in self.param_names:
            if n not in params:
                raise ModelError(f"parameter '{n}' is missing")
            if not np.all(np.isfinite(np.asarray(params[n], dtype=float))):
                raise ModelError(f"parameter '{n}' must be a finite number")

    # ---- variants of one family ------------------------------------------------------
    def configure(self, **options) -> "ModelSpec":
        """A variant of this model chosen by options (models without options take none)."""
        if options:
            raise TypeError(f"model '{self.name}' takes no options (got {sorted(options)})")
        return self

    def for_params(self, names) -> "ModelSpec":
        """The variant whose parameters are exactly `names` (as stored in a curve document)."""
        names = tuple(names)
        if names != self.param_names:
            raise ModelError(
                f"model '{self.name}' has parameters {list(self.param_names)}, not {list(names)}"
            )
        return self

    # ---- adapters for fitting libraries ----------------------------------------------
    def fit_function(self) -> Callable:
        """C as f(V, p1, p2, ...) in param_names order (for lmfit and curve_fit)."""
        return named_function(self.C, self.param_names, f"{self.name}_C")

    def as_positional(self, fixed: Mapping[str, float] | None = None):
        """(f(V, *free), free_names): C with `fixed` parameters bound, for curve_fit."""
        fixed = dict(fixed or {})
        free = tuple(n for n in self.param_names if n not in fixed)

        def f(V, *args):
            return self.C(V, **fixed, **dict(zip(free, args)))

        f.__name__ = f"{self.name}_C_positional"
        return f, free

    def lmfit_model(self, **kws):
        """An lmfit.Model of C(V) with this model's hints and a data-derived guess()."""
        return _SpecModel(self, **kws)

    def __repr__(self) -> str:
        return f"<model {self.name}: {', '.join(self.param_names)}>"


def _lmfit():
    import lmfit  # imported on first use: curve evaluation alone does not need it

    return lmfit


def _make_spec_model_class():
    lmfit = _lmfit()

    class SpecModel(lmfit.Model):
        """lmfit.Model bound to a ModelSpec: hints from spec.hints(), guess from spec.guess()."""

        def __init__(self, spec: ModelSpec, **kws):
            self.spec = spec
            super().__init__(spec.fit_function(), independent_vars=["V"], **kws)
            for pname, hint in spec.hints().items():
                self.set_param_hint(pname, **hint)

        def guess(self, data, V=None, **kws):
            if V is None:
                raise TypeError("guess() needs the bias values: guess(data, V=bias_V)")
            values = self.spec.guess(np.asarray(V, dtype=float), np.asarray(data, dtype=float))
            params = self.make_params()
            for pname, value in values.items():
                params[pname].set(value=value)
            return lmfit.models.update_param_vals(params, self.prefix, **kws)

    return SpecModel


_SPEC_MODEL_CLASS = None


def _SpecModel(spec: ModelSpec, **kws):
    global _SPEC_MODEL_CLASS
    if _SPEC_MODEL_CLASS is None:
        _SPEC_MODEL_CLASS = _make_spec_model_class()
    return _SPEC_MODEL_CLASS(spec, **kws)


def scan_two_term(a, b, y):
    """Best (alpha, beta) >= 0 of y ~ alpha*a + beta*b for many trial shapes at once.

    a, b: arrays (n_trials, n_points), one row per trial value of a nonlinear parameter;
    returns (alpha, beta, ssr) arrays of n_trials, by the 2x2 normal equations, with alpha
    clipped to 0 (and beta refitted) where the free solution makes it negative. Used by
    guess() to scan a shape parameter while the amplitudes are solved exactly.
    """
    aa, ab, bb = np.sum(a * a, 1), np.sum(a * b, 1), np.sum(b * b, 1)
    ay, by = a @ y, b @ y
    det = aa * bb - ab * ab
    with np.errstate(divide="ignore", invalid="ignore"):
        alpha = (ay * bb - by * ab) / det
        beta = (by * aa - ay * ab) / det
        clip = ~(alpha >= 0) | ~np.isfinite(beta)
        alpha = np.where(clip, 0.0, alpha)
        beta = np.where(clip, by / bb, beta)
    ssr = np.sum((alpha[:, None] * a + beta[:, None] * b - y) ** 2, axis=1)
    ssr = np.where(np.isfinite(ssr) & (beta > 0), ssr, np.inf)
    return alpha, beta, ssr
