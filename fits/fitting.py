"""Fitting C(V) models to a bias sweep: one branch (fit_sweep) or both (fit_branches).

How a fit is done, and why:
- Solver: lmfit (Levenberg-Marquardt, `leastsq`) on the model's lmfit.Model with the model's
  analytic jacobian, on capacitance divided by its largest value (every model is homogeneous
  of degree 1 in its `_F` parameters, so this changes nothing but the conditioning). Tolerances are tight
  (xtol = ftol = 1e-13) so the optimum does not depend on the solver's path.
- Weights: 1/sigma (fits.sweepdata: given sigma, else pooled repeat scatter, else none).
- Parameters that end on a bound (e.g. C_p_F at 0) are held there and the fit redone, so the
  covariance is taken at an interior optimum; the report lists them as held.
- Covariance: (J^T W J)^-1 from the analytic jacobian at the optimum, scaled by
  fits.statistics.covariance_scale: chi2_red when unweighted, max(1, chi2_red) when weighted
  (lmfit is run with scale_covar=False and this scaling is applied here, deliberately).
- Choice: by BIC (lmfit's convention), lowest first, both within a family (polynomial
  degree, Landau with or without C_p) and between families ("auto": tanh, poly, landau).
  BIC rather than AIC because sweeps are short (10-40 points): with AIC degree-8
  polynomials beat the true tanh law on two 13-point synthetic branches with 0.2 % noise,
  with BIC they did not (a compact law with few parameters is what a curve library and a SPICE
  export need). The ranking lists each family's best variant with its AIC and BIC.
- Valid range: the measured bias range. Nothing here extrapolates.
- Curve.stats: the contract keys (r2, rms_pct_C0, max_resid_pct_C0, n_points, aic, bic; the
  percentages of C at the measured bias nearest 0 V) plus k_params, n_points_fit (both
  branches for a joint fit), chi2_red (dimensionless when weighted, the residual variance in
  F^2 when unweighted), covar_scale, weighting, variant and, if any, held_at_bound.
- Hysteresis: fit_branches fits the rising and falling branches. For the tanh model the two
  share C_inf, C_pk and V0 and each has its own V_off (5 parameters in one fit); the other
  families are fitted to each branch separately. Families are ranked by the BIC of the
  combined residuals of both branches.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from fits import models
from fits.curve import Curve
from fits.errors import FitError
from fits.models.base import ModelSpec, Variant, is_capacitance_param
from fits.report import format_fit_report, format_ranking
from fits.statistics import covariance_scale, information_criteria, residual_stats
from fits.sweepdata import BIAS_GROUP_TOL_V, SweepData, check_sweep

AUTO_MODELS = ("tanh", "poly", "landau")
BRANCHES = ("rising", "falling")
#: a free parameter this close (relative) to one of its bounds is held on the bound
_BOUND_REL = 1e-7
#: reciprocal condition number of the column-scaled weighted jacobian below which the
#: parameters are taken as not determined by the data
_MIN_RCOND = 1e-9
_FIT_KWS = {"xtol": 1e-13, "ftol": 1e-13}
#: with analytic jacobians converging fits need tens of evaluations; a fit of the wrong law
#: that wanders is stopped here and reported as not converged
_MAX_NFEV = 2000


class _CannotFit(Exception):
    """This variant/family cannot be fitted to this data (reason in the message)."""


@dataclass
class VariantFit:
    """The result of fitting one variant (internal, but exposed on FitOutcome.fit)."""

    label: str
    spec: ModelSpec
    params: dict[str, float]
    covariance: np.ndarray  # over spec.param_names, zeros for fixed/held parameters
    free_names: tuple[str, ...]
    held: tuple[str, ...]
    chi2: float
    n: int
    k: int
    chi2_red: float
    covar_scale: float
    aic: float
    bic: float
    C_model_F: np.ndarray
    lmfit_result: object | None = None
    joint: str | None = None  # description when fitted jointly with the other branch

    @property
    def dof(self) -> int:
        return self.n - self.k


@dataclass
class FitOutcome:
    """What fit_sweep returns: the chosen curve, the ranking and a report for people."""

    curve: Curve
    ranking: list[tuple[str, float, float]]
    report: str
    data: SweepData
    fit: VariantFit | None
    candidates: dict[str, Curve] = field(default_factory=dict)
    skipped: dict[str, str] = field(default_factory=dict)

    @property
    def residuals_F(self) -> np.ndarray:
        return self.data.C_F - self.curve.C(self.data.bias_V)

    def plot(self, path=None, title=None):
        """Data, fit, uncertainty band and residuals (a new figure); saved as PNG or PDF by
        path's suffix when path is given. Curve.plot(ax) draws on an existing Axes."""
        from fits import plots

        return plots.plot_fits([self], path=path, title=title)


@dataclass
class BranchOutcome:
    """What fit_branches returns: one FitOutcome per branch present, a shared ranking."""

    outcomes: dict[str, FitOutcome]
    ranking: list[tuple[str, float, float]]
    report: str

    @property
    def curves(self) -> dict[str, Curve]:
        return {b: o.curve for b, o in self.outcomes.items()}

    @property
    def primary(self) -> Curve:
        """The rising branch (the falling one if only that was measured)."""
        return (self.outcomes.get("rising") or self.outcomes["falling"]).curve

    def plot(self, path=None, title=None):
        """Both branches in one figure (data, fits, bands, residuals); PNG or PDF by suffix."""
        from fits import plots

        return plots.plot_fits(list(self.outcomes.values()), path=path, title=title)


# ---------------------------------------------------------------------------------------
# public entry points


def fit_sweep(bias_V, C_F, sigma_F=None, model="auto", branch: str | None = None, *,
              conditions: Mapping | None = None, source: Mapping | None = None,
              origin: str = "measured", part_id: str | None = None,
              sample_id: str | None = None, candidates=AUTO_MODELS) -> FitOutcome:
    """Fit one branch of a sweep. model: "auto", a registered name or a ModelSpec."""
    if branch is not None and branch not in BRANCHES:
        raise FitError(f"branch must be 'rising', 'falling' or None, not {branch!r}")
    data = check_sweep(bias_V, C_F, sigma_F, what=f"{branch} branch" if branch else "sweep")
    meta = dict(conditions=conditions, source=source, origin=origin, part_id=part_id,
                sample_id=sample_id, branch=branch)
    families = _families(model, candidates)
    if len(families) == 1 and not families[0].fitted:
        return _table_outcome(families[0], data, meta)

    fits_by_family: dict[str, VariantFit] = {}
    skipped: dict[str, str] = {}
    for spec in families:
        try:
            fits_by_family[spec.name] = _fit_family(spec, data)
        except _CannotFit as exc:
            skipped[spec.name] = str(exc)
    if not fits_by_family:
        where = f"{branch} branch" if branch else "sweep"
        raise FitError(f"{where}: " + "; ".join(skipped.values()))
    ranking = sorted(((n, f.aic, f.bic) for n, f in fits_by_family.items()), key=lambda r: r[2])
    curves = {n: _curve_from(f, data, meta) for n, f in fits_by_family.items()}
    chosen = ranking[0][0]
    report = _report(branch, data, fits_by_family[chosen], curves[chosen], ranking, skipped,
                     auto=len(families) > 1)
    return FitOutcome(curves[chosen], ranking, report, data, fits_by_family[chosen], curves,
                      skipped)


def fit_branches(bias_V, C_F, branch, sigma_F=None, model="auto", *, shared_shape: bool = True,
                 conditions: Mapping | None = None, source: Mapping | None = None,
                 origin: str = "measured", part_id: str | None = None,
                 sample_id: str | None = None, candidates=AUTO_MODELS) -> BranchOutcome:
    """Fit the rising and falling branches of a hysteretic sweep (labels in `branch`)."""
    labels = np.asarray(branch, dtype=object)
    V = np.asarray(bias_V, dtype=float)
    if labels.shape != V.shape:
        raise FitError(f"{labels.size} branch labels for {V.size} points; give one per point")
    unknown = sorted({str(b) for b in labels} - set(BRANCHES))
    if unknown:
        raise FitError(f"branch labels must be 'rising' or 'falling', found {unknown}")
    C = np.asarray(C_F, dtype=float)
    S = None if sigma_F is None else np.asarray(sigma_F, dtype=float)
    for arr, what in ((C, "capacitance values"), (S, "sigma values")):
        if arr is not None and arr.shape != V.shape:
            raise FitError(f"{arr.size} {what} for {V.size} bias values; give one per point")
    present = [b for b in BRANCHES if np.any(labels == b)]
    meta = dict(conditions=conditions, source=source, origin=origin, part_id=part_id,
                sample_id=sample_id)
    if len(present) == 1:
        b = present[0]
        out = fit_sweep(V, C, S, model, b, candidates=candidates, **meta)
        return BranchOutcome({b: out}, out.ranking, out.report)

    datas = {}
    for b in BRANCHES:
        m = labels == b
        datas[b] = check_sweep(V[m], C[m], None if S is None else S[m], what=f"{b} branch")
    notes = []
    if datas["rising"].weighting != datas["falling"].weighting:
        notes.append(f"weighting differs between branches ({datas['rising'].weighting} / "
                     f"{datas['falling'].weighting}): both fitted unweighted")
        datas = {b: SweepData(d.bias_V, d.C_F, None, "none") for b, d in datas.items()}
    families = _families(model, candidates)
    if len(families) == 1 and not families[0].fitted:
        outs = {b: _table_outcome(families[0], datas[b], dict(meta, branch=b)) for b in BRANCHES}
        return BranchOutcome(outs, outs["rising"].ranking,
                             "\n\n".join(o.report for o in outs.values()))

    results: dict[str, dict[str, VariantFit]] = {}
    skipped: dict[str, str] = {}
    for spec in families:
        try:
            if spec.name == "tanh" and shared_shape:
                results[spec.name] = _fit_tanh_shared(datas["rising"], datas["falling"])
            else:
                results[spec.name] = {b: _fit_family(spec, datas[b]) for b in BRANCHES}
        except _CannotFit as exc:
            skipped[spec.name] = str(exc)
    if not results:
        raise FitError("rising and falling branches: " + "; ".join(skipped.values()))
    ranking = []
    for name, per_branch in results.items():
        aic, bic = _combined_criteria(per_branch, datas)
        ranking.append((name, aic, bic))
    ranking.sort(key=lambda r: r[2])
    chosen = ranking[0][0]
    outcomes = {}
    for b in BRANCHES:
        vf = results[chosen][b]
        curves = {n: _curve_from(r[b], datas[b], dict(meta, branch=b)) for n, r in results.items()}
        report = _report(b, datas[b], vf, curves[chosen], ranking, skipped,
                         auto=len(families) > 1, notes=notes, combined=True)
        outcomes[b] = FitOutcome(curves[chosen], ranking, report, datas[b], vf, curves, skipped)
    report = "\n\n".join(o.report for o in outcomes.values())
    return BranchOutcome(outcomes, ranking, report)


# ---------------------------------------------------------------------------------------
# one variant, one family


def _families(model, candidates) -> list[ModelSpec]:
    if isinstance(model, ModelSpec):
        return [model]
    if model == "auto":
        return [models.get(n) for n in candidates]
    try:
        return [models.get(model)]
    except KeyError as exc:
        raise FitError(f"{exc.args[0]} (or 'auto')") from None


def _fit_family(spec: ModelSpec, data: SweepData) -> VariantFit:
    """Fit every variant the family offers for this data; keep the lowest BIC.

    For a family linear in its free parameters (the polynomial) the variants are first
    ranked by the BIC of their exact weighted linear least-squares solution (numpy), and only
    the best is then fitted through lmfit: same answer, a fraction of the work."""
    variants = spec.variants(data.bias_V, data.C_F)
    if getattr(spec, "linear", False) and len(variants) > 1:
        variants = [_linear_prescreen(variants, data)]
    fits, reasons = [], []
    for variant in variants:
        try:
            fits.append(_fit_variant(variant, data))
        except _CannotFit as exc:
            reasons.append(str(exc))
    if not fits:
        raise _CannotFit(reasons[0])  # the simplest variant's reason comes first
    best = min(f.bic for f in fits)
    # a variant whose extra parameter ran onto its bound ties with the simpler variant:
    # report the simpler one
    tied = [f for f in fits if f.bic <= best + 1e-6 * max(1.0, abs(best))]
    return min(tied, key=lambda f: len(f.held))


def _linear_prescreen(variants: list[Variant], data: SweepData) -> Variant:
    w = data.weights
    scored = []
    for v in variants:
        k = len(v.free_names)
        if data.n <= k or data.n_distinct < k:
            continue
        start = dict(v.spec.guess(data.bias_V, data.C_F), **v.fixed)
        idx = [v.spec.param_names.index(n) for n in v.free_names]
        A = v.spec.jacobian(data.bias_V, start)[:, idx] * w[:, None]
        coef, *_ = np.linalg.lstsq(A, data.C_F * w, rcond=None)
        chi2 = float(np.sum((A @ coef - data.C_F * w) ** 2))
        _, bic = information_criteria(chi2, data.n, k, float(np.sqrt(np.mean((data.C_F * w) ** 2))))
        scored.append((bic, v))
    return min(scored, key=lambda t: t[0])[1] if scored else variants[0]


def _require_points(data: SweepData, k: int, label: str) -> None:
    if data.n <= k:
        raise _CannotFit(f"{label} needs at least {k + 1} points for its {k} free parameters, "
                         f"got {data.n}")
    if data.n_distinct < k:
        raise _CannotFit(f"{label} needs readings at {k} or more bias values for its {k} free "
                         f"parameters, got {data.n_distinct}")


def _scaled(name: str, value: float, Cs: float) -> float:
    return value / Cs if is_capacitance_param(name) else value


def _at_bound(par) -> float | None:
    for bound in (par.min, par.max):
        if np.isfinite(bound) and abs(par.value - bound) <= _BOUND_REL * max(1.0, abs(bound)):
            return float(bound)
    return None


def _fit_variant(variant: Variant, data: SweepData) -> VariantFit:
    spec = variant.spec
    free = list(variant.free_names)
    _require_points(data, len(free), variant.label)
    Cs = float(np.max(data.C_F))
    y = data.C_F / Cs
    w_scaled = None if data.sigma_F is None else Cs / data.sigma_F
    model = spec.lmfit_model()
    params = model.make_params()
    start = spec.guess(data.bias_V, y)
    for n, (lo, hi) in spec.data_bounds(data.bias_V, y).items():
        params[n].set(min=max(lo, params[n].min), max=min(hi, params[n].max))
    for n in spec.param_names:
        if n in variant.fixed:
            params[n].set(value=_scaled(n, float(variant.fixed[n]), Cs), vary=False)
        else:
            params[n].set(value=float(start[n]), vary=True)

    def dfun(pars, ydata, weights, V=None, **_):
        vals = pars.valuesdict()
        cols = [spec.param_names.index(n) for n, p in pars.items() if p.vary]
        J = -spec.jacobian(V, vals)[:, cols]  # lmfit.Model's residual is (data - model)*w
        return J if weights is None else J * weights[:, None]

    fit_kws = dict(_FIT_KWS)
    if spec.analytic_jacobian:
        fit_kws["Dfun"] = dfun
    held: list[str] = []
    while True:
        try:
            result = model.fit(y, params, V=data.bias_V, weights=w_scaled, method="leastsq",
                               scale_covar=False, nan_policy="raise", max_nfev=_MAX_NFEV,
                               calc_covar=False, fit_kws=fit_kws)
        except ValueError as exc:  # NaN from a wild trial step
            raise _CannotFit(f"{variant.label}: the fit failed ({exc})") from None
        if not _converged(result):
            raise _CannotFit(f"{variant.label}: did not converge ({result.message})")
        newly = _hold_at_bounds(result, params, free, held)
        if not newly:
            break
        for n in newly:
            free.remove(n)
        if not free:
            raise _CannotFit(f"{variant.label}: every parameter ran onto a bound")
    values = {n: float(v) * (Cs if is_capacitance_param(n) else 1.0)
              for n, v in result.params.valuesdict().items()}
    J = spec.jacobian(data.bias_V, values)
    free_idx = [spec.param_names.index(n) for n in free]
    vf = _finish(variant.label, spec, values, J[:, free_idx], free_idx, tuple(free), tuple(held),
                 data, spec.C(data.bias_V, **values))
    vf.lmfit_result = result
    return vf


def _hold_at_bounds(result, params, free, held: list[str]) -> list[str]:
    """Fix at its bound every free parameter the fit ran onto, start the next fit from this
    one's values, and return the names newly held (appended to `held`): a parameter at a
    bound has no honest standard error, so it is held and reported, not left to vary."""
    newly = [(n, _at_bound(result.params[n])) for n in free]
    newly = [(n, b) for n, b in newly if b is not None]
    if newly:
        for n, p in result.params.items():
            params[n].set(value=p.value)
        for n, b in newly:
            params[n].set(value=b, vary=False)
            held.append(n)
    return [n for n, _ in newly]


def _converged(result) -> bool:
    """MINPACK's ier 1-4 are convergence; 6-8 say the tolerances (1e-13) are below what
    double precision can still improve, i.e. the optimum is reached to round-off. ier 5 (too
    many evaluations) and errors are failures."""
    return bool(result.success) or getattr(result, "ier", None) in (6, 7, 8)


def _unscaled_covariance(J_free: np.ndarray, w: np.ndarray, label: str) -> np.ndarray:
    """(J^T W J)^-1 computed on column-scaled J; refuse when the parameters are not
    determined by the data (reciprocal condition number below _MIN_RCOND)."""
    Jw = J_free * w[:, None]
    norms = np.linalg.norm(Jw, axis=0)
    if np.any(norms == 0):
        raise _CannotFit(f"{label}: a parameter has no effect on the fitted points")
    U, s, Vt = np.linalg.svd(Jw / norms, full_matrices=False)
    if s[-1] < _MIN_RCOND * s[0]:
        raise _CannotFit(f"{label}: parameters are not determined by this data "
                         "(their effects on C(V) cannot be told apart)")
    inv = (Vt.T / s**2) @ Vt
    return inv / np.outer(norms, norms)


def _finish(label, spec, values, J_free, free_idx, free, held, data, C_model) -> VariantFit:
    """Covariance (scaled per fits.statistics.covariance_scale), chi2 and AIC/BIC."""
    w = data.weights
    cov_u = _unscaled_covariance(J_free, w, label)
    chi2, n, k = float(np.sum(((data.C_F - C_model) * w) ** 2)), data.n, len(free)
    chi2_red = chi2 / (n - k)
    scale = covariance_scale(chi2_red, data.sigma_F is not None)
    aic, bic = information_criteria(chi2, n, k, float(np.sqrt(np.mean((data.C_F * w) ** 2))))
    K = len(spec.param_names)
    cov = np.zeros((K, K))
    cov[np.ix_(free_idx, free_idx)] = cov_u * scale
    return VariantFit(label, spec, values, cov, free, held, chi2, n, k, chi2_red, scale, aic,
                      bic, C_model)


# ---------------------------------------------------------------------------------------
# both branches of the tanh model with a shared shape


def _fit_tanh_shared(rising: SweepData, falling: SweepData) -> dict[str, VariantFit]:
    import lmfit

    spec = models.get("tanh")
    label = "tanh, shared shape"
    shared = ("C_inf_F", "C_pk_F", "V0_V")
    n_total = rising.n + falling.n
    if n_total <= 5 or min(rising.n_distinct, falling.n_distinct) < 2:
        raise _CannotFit(f"{label} needs more than 5 points and 2 or more biases per branch")
    Cs = float(max(rising.C_F.max(), falling.C_F.max()))
    ys = {"rising": rising.C_F / Cs, "falling": falling.C_F / Cs}
    ws = {b: (np.ones(d.n) if d.sigma_F is None else Cs / d.sigma_F)
          for b, d in (("rising", rising), ("falling", falling))}
    Vs = {"rising": rising.bias_V, "falling": falling.bias_V}
    g_r, g_f = spec.guess(Vs["rising"], ys["rising"]), spec.guess(Vs["falling"], ys["falling"])
    names = shared + ("V_off_rising_V", "V_off_falling_V")
    params = lmfit.Parameters()
    hints = spec.hints()
    for n in shared:
        params.add(n, value=0.5 * (g_r[n] + g_f[n]), **hints[n])
    params.add("V_off_rising_V", value=g_r["V_off_V"])
    params.add("V_off_falling_V", value=g_f["V_off_V"])
    limits = spec.data_bounds(np.r_[Vs["rising"], Vs["falling"]],
                              np.r_[ys["rising"], ys["falling"]])
    for n, (lo, hi) in limits.items():
        for target in ([n] if n in shared else ["V_off_rising_V", "V_off_falling_V"]):
            params[target].set(min=max(lo, params[target].min), max=min(hi, params[target].max))

    def branch_params(vals, b):
        p = {n: vals[n] for n in shared}
        p["V_off_V"] = vals[f"V_off_{b}_V"]
        return p

    def resid(pars):
        vals = pars.valuesdict()
        return np.concatenate([(spec.C(Vs[b], **branch_params(vals, b)) - ys[b]) * ws[b]
                               for b in BRANCHES])

    def joint_jac(vals, weighted=True):
        """d(model)/d(joint parameter), rows rising then falling, columns in `names`."""
        blocks = []
        for b in BRANCHES:
            J = spec.jacobian(Vs[b], branch_params(vals, b))
            if weighted:
                J = J * ws[b][:, None]
            full = np.zeros((J.shape[0], 5))
            full[:, :3] = J[:, :3]
            full[:, 3 if b == "rising" else 4] = J[:, 3]
            blocks.append(full)
        return np.vstack(blocks)

    def dfun(pars):
        cols = [names.index(n) for n, p in pars.items() if p.vary]
        return joint_jac(pars.valuesdict())[:, cols]

    held: list[str] = []
    while True:
        result = lmfit.Minimizer(resid, params, nan_policy="raise", max_nfev=_MAX_NFEV,
                                 calc_covar=False).minimize(method="leastsq", Dfun=dfun,
                                                            **_FIT_KWS)
        if not _converged(result):
            raise _CannotFit(f"{label}: did not converge ({result.message})")
        if not _hold_at_bounds(result, params, [n for n in names if result.params[n].vary], held):
            break
        if len(held) == len(names):
            raise _CannotFit(f"{label}: every parameter ran onto a bound")
    vals = {n: v * (Cs if is_capacitance_param(n) else 1.0)
            for n, v in result.params.valuesdict().items()}
    free_joint = [n for n in names if n not in held]
    free_idx = [names.index(n) for n in free_joint]
    datas = {"rising": rising, "falling": falling}
    # covariance of the joint fit in farads and volts, from the analytic jacobian
    w_all = np.concatenate([datas[b].weights for b in BRANCHES])
    cov_u = _unscaled_covariance(joint_jac(vals, weighted=False)[:, free_idx], w_all, label)
    C_models = {b: spec.C(Vs[b], **branch_params(vals, b)) for b in BRANCHES}
    chi2 = float(sum(np.sum(((datas[b].C_F - C_models[b]) * datas[b].weights) ** 2)
                     for b in BRANCHES))
    k = len(free_joint)
    chi2_red = chi2 / (n_total - k)
    scale = covariance_scale(chi2_red, rising.sigma_F is not None)
    C_all = np.concatenate([datas[b].C_F * datas[b].weights for b in BRANCHES])
    aic, bic = information_criteria(chi2, n_total, k, float(np.sqrt(np.mean(C_all**2))))
    cov_joint = np.zeros((5, 5))
    cov_joint[np.ix_(free_idx, free_idx)] = cov_u * scale

    def own(name_list, b):
        """Joint names of branch b as the tanh model names them."""
        return tuple(n if n in shared else "V_off_V" for n in name_list
                     if n in shared or n == f"V_off_{b}_V")

    out = {}
    for b in BRANCHES:
        sel = [0, 1, 2, 3 if b == "rising" else 4]
        p = branch_params(vals, b)
        out[b] = VariantFit(
            label, spec, {n: float(p[n]) for n in spec.param_names},
            cov_joint[np.ix_(sel, sel)], own(free_joint, b), own(held, b), chi2, n_total, k,
            chi2_red, scale, aic, bic, C_models[b], result,
            joint="rising and falling fitted together: C_inf_F, C_pk_F, V0_V shared, "
                  "V_off_V per branch")
    return out


def _combined_criteria(per_branch: dict[str, VariantFit], datas) -> tuple[float, float]:
    """AIC/BIC of both branches together (sum of chi2, of points and of free parameters)."""
    first = per_branch["rising"]
    if first.joint:
        return first.aic, first.bic
    chi2 = sum(f.chi2 for f in per_branch.values())
    n = sum(f.n for f in per_branch.values())
    k = sum(f.k for f in per_branch.values())
    C_all = np.concatenate([d.C_F * d.weights for d in datas.values()])
    return information_criteria(chi2, n, k, float(np.sqrt(np.mean(C_all**2))))


# ---------------------------------------------------------------------------------------
# the table model (interpolation of the means at each bias)


def _table_outcome(spec: ModelSpec, data: SweepData, meta: dict) -> FitOutcome:
    """PCHIP through the mean capacitance at each distinct bias.

    Uncertainty of each point: the standard error of its group mean, sqrt(sum sigma^2)/n_g
    from the weights; with no scatter information the covariance is zero (said so in the
    report)."""
    _, group = np.unique(np.round(data.bias_V / BIAS_GROUP_TOL_V), return_inverse=True)
    counts = np.bincount(group)
    knots_V = np.bincount(group, weights=data.bias_V) / counts
    means = np.bincount(group, weights=data.C_F) / counts
    table = models.get("table", n_points=knots_V.size)
    values = table.params_from_points(knots_V, means)
    K = len(table.param_names)
    cov = np.zeros((K, K))
    notes = []
    if data.sigma_F is not None:
        u = np.sqrt(np.bincount(group, weights=data.sigma_F**2)) / counts
        idx = np.arange(knots_V.size) + knots_V.size
        cov[idx, idx] = u**2
    else:
        notes.append("no scatter information (no sigma, no repeats): the table carries zero "
                     "covariance")
    C_model = table.C(data.bias_V, **values)
    vf = VariantFit(f"table of {knots_V.size} points", table, values, cov, (), (),
                    float("nan"), data.n, knots_V.size, float("nan"), 1.0, float("nan"),
                    float("nan"), C_model)
    curve = _curve_from(vf, data, meta)
    ranking = [("table", float("nan"), float("nan"))]
    report = _report(meta.get("branch"), data, vf, curve, ranking, {}, auto=False, notes=notes)
    return FitOutcome(curve, ranking, report, data, vf, {"table": curve}, {})


# ---------------------------------------------------------------------------------------
# curve and report


def _curve_from(vf: VariantFit, data: SweepData, meta: Mapping) -> Curve:
    ref_i = int(np.argmin(np.abs(data.bias_V)))
    C_ref = float(vf.spec.C(data.bias_V[ref_i], **vf.params))
    stats = residual_stats(data.C_F, vf.C_model_F, C_ref)
    stats.update({
        "n_points": data.n, "aic": vf.aic, "bic": vf.bic, "k_params": vf.k,
        "n_points_fit": vf.n, "chi2_red": vf.chi2_red, "covar_scale": vf.covar_scale,
        "weighting": data.weighting, "variant": vf.label,
    })
    if vf.held:
        stats["held_at_bound"] = list(vf.held)
    source = dict(meta.get("source") or {})
    for key in ("sample_id", "part_id", "branch"):
        if meta.get(key) is not None:
            source.setdefault(key, meta[key])
    lo, hi = float(np.min(data.bias_V)), float(np.max(data.bias_V))
    return Curve(vf.spec.name, vf.params, vf.covariance, (lo, hi),
                 conditions=meta.get("conditions"), stats=stats, source=source,
                 origin=meta.get("origin") or "measured",
                 part_id=meta.get("part_id") or source.get("part_id"),
                 sample_id=meta.get("sample_id") or source.get("sample_id"),
                 branch=meta.get("branch"), param_names=vf.spec.param_names)


def _report(branch, data, vf, curve, ranking, skipped, *, auto, notes=(), combined=False):
    head = format_ranking(ranking, skipped, auto=auto, combined=combined)
    return format_fit_report(branch, data, vf, curve, head, list(notes))
