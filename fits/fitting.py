"""Fitting C(V) models to a bias sweep: one branch (fit_sweep) or both (fit_branches).

How a fit is done, and why:
- Solver: fits.solver (MINPACK Levenberg-Marquardt with the model's analytic jacobian, simple
  bounds held by an active set) on capacitance divided by its largest value (every model is
  homogeneous of degree 1 in its `_F` parameters, so this changes nothing but the
  conditioning). Tolerances are tight (xtol = ftol = 1e-13) so the optimum does not depend on
  the solver's path. Models linear in their parameters (the polynomial) are solved exactly by
  weighted linear least squares.
- Weights: 1/sigma (fits.sweepdata: given sigma, else pooled repeat scatter, else none).
- Parameters that end on a bound (e.g. C_p_F at 0) are held there and the fit redone, so the
  covariance is taken at an interior optimum; the report lists them as held.
- Covariance: (J^T W J)^-1 from the analytic jacobian at the optimum, scaled by
  fits.statistics.covariance_scale: chi2_red when unweighted, max(1, chi2_red) when weighted.
- Choice, within a family (polynomial degree, variants of a law) and between families
  ("auto": tanh, genjohnson, landau, poly, spline), by how well each predicts the points it did not
  see: the leave-one-out residual r_i/(1 - h_ii), h the hat matrix of the (linearised) fit,
  exact for a linear model [published: standard regression texts]. The score is the mean of
  the squared weighted leave-one-out residuals of the points inside the bias range
  (_scored_points: leaving out an end point would score extrapolation, which no curve does). Every candidate whose score is within one
  standard error (of the paired differences) of the best counts as as good; among those the
  compact laws come first, then the fewest free parameters, then the score. A polynomial
  whose curve turns between the points where the data do not (fits.quality.turns on a fine
  grid) is refused. Cost: the polynomial variants share one QR per nest (_linear_loo), and
  a simpler variant of a law is not fitted when the freer fit already shows it cannot be
  chosen (_decisively_worse); tests/fits/test_choice_shortcuts.py checks both change
  nothing. Why not BIC any more: on 11-point branches BIC let degree 5-8 polynomials
  win and follow the noise; prediction of unseen points does not reward that.
- Lack of fit (fits.quality): structured residuals or chi-square far above expectation mark
  the fit as not describing the data and add a model-error term to its band.
- Model choice as an uncertainty: every other candidate whose leave-one-out score the data
  cannot tell from the chosen one's at k = 2 (within _BAND_SE_RULE standard errors and
  _BAND_RATIO times the best score; its variants too, VariantFit.alternatives) describes
  the data as well, so where the two part is not known from the data. Their gap at each bias, taken as the half-width of a
  rectangular distribution (/sqrt(3), JCGM 100 4.3.7), is the band's model-choice term:
  a profile over the measured range (Curve.model_choice_u_F, CHOICE_NODES values), wide
  between sparse readings where laws part and nothing where they agree. The lack-of-fit
  term stays in model_error_F (stats.model_choice_F is the profile's largest value,
  stats.model_choice_rivals the laws it spans).
- Valid range: the measured bias range. Nothing here extrapolates.
- Curve.stats: the contract keys (r2, rms_pct_C0, max_resid_pct_C0, n_points, aic, bic; the
  percentages of C at the measured bias nearest 0 V) plus k_params, n_points_fit (both
  branches for a joint fit), chi2_red (dimensionless when weighted, the residual variance in
  F^2 when unweighted), covar_scale, weighting, variant, loo_rms (root mean square
  leave-one-out residual of the scored points, in units of sigma when weighted, farads when not), the lack-of-fit
  statistics (describes_data, chi2_p, runs, runs_expected, runs_p, model_error_F),
  model_choice_F, model_choice_rivals, flat and,
  if any, held_at_bound.
- Hysteresis: fit_branches fits the rising and falling branches. For the tanh model the two
  share C_inf, C_pk and V0 and each has its own V_off (5 parameters in one fit); the other
  families are fitted to each branch separately. Each branch chooses its family on its own
  leave-one-out scores (BranchOutcome.ranking is the rising branch's).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
from scipy.linalg import solve_triangular
from scipy.special import chdtrc

from fits import models, quality
from fits.curve import Curve
from fits.errors import FitError
from fits.models.base import ModelSpec, Variant, is_capacitance_param
from fits.report import format_fit_report, format_ranking
from fits.solver import SolveError, solve
from fits.statistics import covariance_scale, information_criteria, residual_stats
from fits.sweepdata import BIAS_GROUP_TOL_V, SweepData, check_sweep

AUTO_MODELS = ("tanh", "genjohnson", "landau", "poly", "spline")
BRANCHES = ("rising", "falling")
#: reciprocal condition number of the column-scaled weighted jacobian below which the
#: parameters are taken as not determined by the data
_MIN_RCOND = 1e-9
#: with analytic jacobians converging fits need tens of evaluations; a fit of the wrong law
#: that wanders is stopped here and reported as not converged
_MAX_NFEV = 2000
#: relative tolerances of the C(V) fits (MINPACK xtol, ftol): a change of 1e-10 in a
#: parameter is far below any uncertainty a sweep gives
_TOL = 1e-10
#: leave-one-out scores are floored at (this * typical |C*w|)^2: noise-free data then tie
#: at round-off instead of ranking by it
_LOO_FLOOR_REL = 1e-10
#: "as good as the best" = leave-one-out excess within this many standard errors. The usual
#: one-standard-error rule, widened by half: on 30-point sweeps of a Landau-type truth the
#: five-parameter law's extra peak position bought a 1.06-s.e. lower score from the noise
#: alone (tests/fits/test_recovery_coverage.py), so 1 s.e. still let noise pick the freer law
_SE_RULE = 1.5
#: ... and a score at most this multiple of the best: with heavy-tailed scores (one point a
#: law cannot follow) the standard error grows with the misfit and alone would call a law
#: 10^4 times worse "as good"
_AS_GOOD_RATIO = 2.0
#: a rival enters the band's model-choice term when its leave-one-out excess over the chosen
#: law is within this many standard errors: the data cannot tell the two apart at k = 2, the
#: coverage factor of the band (a wider net than _SE_RULE, which only picks the law)
_BAND_SE_RULE = 2.0
#: ... and a score at most this multiple of the best (as _AS_GOOD_RATIO, doubled for the
#: wider net): a law that predicts the points several times worse is not one the data
#: cannot tell apart, however wide its scores' scatter makes their standard error
_BAND_RATIO = 2.0 * _AS_GOOD_RATIO
#: values of the model-choice profile, equally spaced over the measured range
CHOICE_NODES = 9
#: points of the fine grid on which a candidate's turns are counted
_GRID = 400


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
    loo_scores: np.ndarray | None = None  # squared weighted leave-one-out residuals
    scored: np.ndarray | None = None  # which points' scores count (_scored_points)
    joint: str | None = None  # description when fitted jointly with the other branch
    quality: dict = field(default_factory=dict)
    #: other variants of the family that predict as well (_choose's "band_rival"): the data
    #: cannot tell them from this one (their spread enters the band, _model_choice_profile)
    alternatives: list = field(default_factory=list)
    #: the band's model-choice term at CHOICE_NODES biases (_model_choice_profile), or None
    choice_profile: np.ndarray | None = None

    @property
    def dof(self) -> int:
        return self.n - self.k

    @property
    def scored_loo(self) -> np.ndarray | None:
        """The leave-one-out scores that count in the choice (the end points' do not)."""
        if self.loo_scores is None or self.scored is None:
            return self.loo_scores
        return self.loo_scores[self.scored]

    @property
    def loo(self) -> float:
        sc = self.scored_loo
        return float(np.mean(sc)) if sc is not None else float("nan")

    @property
    def compact(self) -> bool:
        return bool(getattr(self.spec, "compact", False)) or _is_flat(self)


def _is_flat(vf: VariantFit) -> bool:
    return vf.spec.name == "poly" and tuple(vf.spec.powers) == (0,)


@dataclass
class FitOutcome:
    """What fit_sweep returns: the chosen curve, the ranking and a report for people."""

    curve: Curve
    ranking: list[tuple[str, float, float]]
    report: str
    data: SweepData
    fit: VariantFit | None
    candidate_fits: dict[str, VariantFit] = field(default_factory=dict)
    skipped: dict[str, str] = field(default_factory=dict)
    meta: dict = field(default_factory=dict)

    @property
    def candidates(self) -> dict[str, Curve]:
        """The curve of every family fitted (built on demand: most callers need only one)."""
        out = {}
        for n, f in self.candidate_fits.items():
            out[n] = self.curve if f is self.fit else _curve_from(f, self.data, self.meta)
        return out

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
        why = _refuted_by_freer_law(spec, fits_by_family, data)
        if why:
            skipped[spec.name] = why
            continue
        try:
            fits_by_family[spec.name] = _fit_family(spec, data)
        except _CannotFit as exc:
            skipped[spec.name] = str(exc)
    if not fits_by_family:
        where = f"{branch} branch" if branch else "sweep"
        raise FitError(f"{where}: " + "; ".join(skipped.values()))
    for f in fits_by_family.values():
        _assess(f, data)
    order, table = _choose({n: f.scored_loo for n, f in fits_by_family.items()},
                           {n: (f.compact, f.k, _is_flat(f), f.quality["describes_data"])
                            for n, f in fits_by_family.items()}, weighted=data.sigma_F is not None)
    if len(families) > 1 and "poly" in fits_by_family:
        order, table = _flat_first(fits_by_family, data, order, table)
    ranking = [(n, fits_by_family[n].loo, fits_by_family[n].bic) for n in order]
    chosen = order[0]
    vf = fits_by_family[chosen]
    _finalise(vf, data, _rivals(fits_by_family, order, table))
    curve = _curve_from(vf, data, meta)
    report = _report(branch, data, vf, curve, table, skipped, auto=len(families) > 1)
    return FitOutcome(curve, ranking, report, data, vf, fits_by_family, skipped, meta)


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
        whys = [_refuted_by_freer_law(spec, {n: r[b] for n, r in results.items()}, datas[b])
                for b in BRANCHES]
        if all(whys):
            skipped[spec.name] = "; ".join(f"{b} branch: {w}" for b, w in zip(BRANCHES, whys))
            continue
        try:
            if spec.name == "tanh" and shared_shape:
                results[spec.name] = _fit_tanh_shared(datas["rising"], datas["falling"])
            else:
                results[spec.name] = {b: _fit_family(spec, datas[b]) for b in BRANCHES}
        except _CannotFit as exc:
            skipped[spec.name] = str(exc)
    if not results:
        raise FitError("rising and falling branches: " + "; ".join(skipped.values()))
    outcomes = {}
    rankings = {}
    for b in BRANCHES:
        # each branch chooses its own law: the two legs of a hysteretic loop need not be
        # described equally well by the same family (the falling leg near its turn)
        scores, keys = {}, {}
        for name, per in results.items():
            vf = per[b]
            _assess(vf, datas[b])
            k = vf.k * datas[b].n / vf.n if vf.joint else vf.k
            scores[name] = vf.scored_loo
            keys[name] = (vf.compact, k, _is_flat(vf), vf.quality["describes_data"])
        order, table = _choose(scores, keys, weighted=datas[b].sigma_F is not None)
        if len(families) > 1 and "poly" in results:
            per_b = {n: r[b] for n, r in results.items()}
            order, table = _flat_first(per_b, datas[b], order, table)
            results["poly"][b] = per_b["poly"]
        ranking = []
        for name in order:
            aic, bic = _combined_criteria(results[name], datas)
            ranking.append((name, float(np.mean(scores[name])), bic))
        rankings[b] = ranking
        chosen = order[0]
        vf = results[chosen][b]
        _finalise(vf, datas[b], _rivals({n: r[b] for n, r in results.items()}, order, table))
        bmeta = dict(meta, branch=b)
        curve = _curve_from(vf, datas[b], bmeta)
        report = _report(b, datas[b], vf, curve, table, skipped,
                         auto=len(families) > 1, notes=notes)
        outcomes[b] = FitOutcome(curve, ranking, report, datas[b], vf,
                                 {n: r[b] for n, r in results.items()}, skipped, bmeta)
    ranking = rankings["rising"]
    report = "\n\n".join(o.report for o in outcomes.values())
    return BranchOutcome(outcomes, ranking, report)


# ---------------------------------------------------------------------------------------
# choice by leave-one-out prediction


def _choose(scores: dict[str, np.ndarray], keys: dict[str, tuple], weighted: bool = False):
    """Order candidates. keys[name] = (compact, k free parameters, flat, describes data).
    The first is chosen among those as good as the best (within one standard error of the
    paired differences of their leave-one-out scores) and, if any candidate describes the
    data (fits.quality), among those that do: compact laws before others, then fewer
    parameters, then the flat line, then lower score. When none describes the data the
    lowest score is chosen. The rest follow by score. weighted: the scores are in units of
    sigma, so a law that only noise separates from the best scores about 1 a point; the
    "at most _AS_GOOD_RATIO times the best" limit is then taken from max(best, 1), so a
    flexible candidate that happens to predict this noise draw better than 1 cannot push the
    law that generated the data out of the as-good set.
    Returns (order, table rows)."""
    names = list(scores)
    S = np.array([scores[n] for n in names])
    with np.errstate(invalid="ignore"):
        mean = S.mean(axis=1)
        ib = min(range(len(names)), key=lambda i: (mean[i], keys[names[i]][1]))
        D = S - S[ib]
        d_mean = D.mean(axis=1)
        se = (D.std(axis=1, ddof=1) / np.sqrt(D.shape[1]) if D.shape[1] > 1
              else np.zeros(len(names)))
    means = {n: float(mean[i]) for i, n in enumerate(names)}
    best = names[ib]
    ref = max(float(mean[ib]), 1.0) if weighted else float(mean[ib])
    rows = {}
    for i, n in enumerate(names):
        rows[n] = {"name": n, "loo": means[n], "d_loo": float(d_mean[i]), "se": float(se[i]),
                   "as_good": bool(d_mean[i] <= _SE_RULE * se[i]
                                   and mean[i] <= _AS_GOOD_RATIO * ref) or n == best,
                   "band_rival": bool(d_mean[i] <= _BAND_SE_RULE * se[i]
                                      and mean[i] <= _BAND_RATIO * ref) or n == best,
                   "compact": keys[n][0],
                   "k": keys[n][1]}
    good = [n for n in names if rows[n]["as_good"]]
    describing = [n for n in names if keys[n][3]]
    if describing:
        # a law that describes the data within their noise beats one that does not, however
        # close their scores: the 1-s.e. rule must not let a structured misfit win
        good = [n for n in good if keys[n][3]] or [min(describing, key=lambda n: means[n])]
    else:
        # nothing describes the data: no preference is earned, the best predictor is chosen
        good = [best]
    if any(keys[n][0] for n in good):
        good = [n for n in good if keys[n][0]]
    first = min(good, key=lambda n: (keys[n][1], not keys[n][2], means[n]))
    rest = sorted((n for n in names if n != first), key=lambda n: means[n])
    order = [first] + rest
    return order, [rows[n] for n in order]


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
    """Fit every variant the family offers for this data and choose among them as between
    families (leave-one-out score, simplest within one standard error); a polynomial whose
    curve turns between the points where the data do not is refused."""
    variants = spec.variants(data.bias_V, data.C_F)
    if not variants:
        raise _CannotFit(f"{spec.name} needs readings at {getattr(spec, 'min_distinct', 2)} or more "
                         f"bias values, got {data.n_distinct}")
    if getattr(spec, "nested", False) and len(variants) > 1:
        return _fit_linear(_linear_choice(variants, data), data)
    if hasattr(spec, "power_basis") and len(variants) > 1:
        return _fit_linear(_spline_choice(variants, data), data)
    fits, reasons = [], []
    allowed = None
    start = None if getattr(spec, "linear", False) else spec.guess(
        data.bias_V, data.C_F / float(np.max(data.C_F)))
    chained = False
    for variant in variants:
        if fits and _same_as_previous(variant, fits[-1]):
            continue  # the previous fit already ended with these parameters held there
        if fits and _decisively_worse(variant, fits[-1], data):
            continue  # the freer fit shows the data refute what this variant fixes
        try:
            vf = _fit_variant(variant, data, start, chained)
            if start is not None and vf.spec is spec:
                # the next, freer variant starts where this one ended (scaled space)
                Cs = float(np.max(data.C_F))
                start = {n: _scaled(n, v, Cs) for n, v in vf.params.items()}
                chained = True
        except _CannotFit as exc:
            reasons.append(str(exc))
            continue
        if not getattr(spec, "compact", False) and len(variants) > 1:
            if allowed is None:
                allowed = quality.data_turns(data.bias_V, data.C_F, data.sigma_F)
            grid = np.linspace(data.bias_V.min(), data.bias_V.max(), _GRID)
            tol = _turn_tol(data)
            if _wiggles(vf.spec.C(grid, **vf.params), grid, data, allowed, tol):
                reasons.append(f"{variant.label}: turns between the points where the data "
                               "do not")
                continue
        fits.append(vf)
    if not fits:
        raise _CannotFit(reasons[0])  # the simplest variant's reason comes first
    if len(fits) == 1:
        return fits[0]
    by = {i: f for i, f in enumerate(fits)}
    for f in fits:
        _assess(f, data)
    order, table = _choose({i: f.scored_loo for i, f in by.items()},
                           {i: (True, f.k, len(f.held), f.quality["describes_data"])
                            for i, f in by.items()}, weighted=data.sigma_F is not None)
    chosen = by[order[0]]
    chosen.alternatives = _rivals(by, order, table)
    return chosen


#: a weighted sweep is flat within noise when the flat line passes both lack-of-fit tests at
#: this level (stricter than the 0.001 that calls a law a misfit: "flat" is a claim)
_P_FLAT = 0.05


def _flat_first(fits_by_family: dict, data: SweepData, order, table):
    """When sigma is known and the flat line describes the data (chi-square and runs both
    at p >= _P_FLAT), the part is flat within noise: the flat line replaces the polynomial's
    candidate and goes first, whatever a law bent by the noise scored."""
    if data.sigma_F is None or data.n_distinct < 3:
        return order, table
    # the flat line's weighted fit is the weighted mean [derived: least squares of a constant]:
    # a chi-square that already refutes it settles the question before any fit is made
    w2 = data.weights ** 2
    mean = float(np.sum(w2 * data.C_F) / np.sum(w2))
    if chdtrc(data.n - 1, float(np.sum(w2 * (data.C_F - mean) ** 2))) < _P_FLAT:
        return order, table
    Vs = float(np.max(np.abs(data.bias_V))) or 1.0
    flat = _fit_linear(Variant(models.get("poly", powers=[0]), {"V_scale_V": Vs},
                               "poly degree 0 (flat)"), data)
    q = quality.assess(data.bias_V, data.C_F - flat.C_model_F, data.sigma_F, flat.dof)
    if not (q["chi2_p"] is not None and q["chi2_p"] >= _P_FLAT and q["runs_p"] >= _P_FLAT):
        return order, table
    _assess(flat, data)
    fits_by_family["poly"] = flat
    order = ["poly"] + [n for n in order if n != "poly"]
    row = {"name": "poly", "loo": flat.loo, "d_loo": float("nan"), "se": float("nan"),
           "as_good": True, "compact": True, "k": 1}
    return order, [row] + [r for r in table if r["name"] != "poly"]


#: a simpler variant is not fitted when the freer one's leave-one-out score is below this
#: fraction of what the simpler one must at least score (twice _BAND_RATIO, the widest of
#: the limits it must exclude: a margin for the quadratic estimate)
_SCREEN_RATIO = 2.0 * _BAND_RATIO


def _decisively_worse(variant: Variant, prev: VariantFit, data: SweepData) -> bool:
    """Cheap screening of a simpler variant of the family before fitting it.

    Fixing parameters the freer fit determined at other values raises chi-square by about
    Delta = d^T Sigma^-1 d (d their distance to the fixed values, Sigma their unscaled
    covariance block; the quadratic approximation of the sum of squares at its minimum). A
    leave-one-out score is at least chi-square / n (every 1/(1 - h_ii) >= 1). So when the
    freer fit describes the data and (chi2 + Delta/2)/n, half the estimate as a margin
    for the approximation, exceeds _SCREEN_RATIO times its own score, the simpler variant
    could be neither as good (_AS_GOOD_RATIO), nor a rival in the band (_BAND_RATIO), nor the
    best-scoring one that describes the data: _choose would never pick it, and its fit is
    skipped. With sigma given the bound must also pass _SCREEN_RATIO times 1, as _choose's
    ratio limits then use max(best, 1)."""
    if prev.spec is not variant.spec or prev.covar_scale <= 0:
        return False
    names = [n for n in variant.fixed if n in prev.free_names]
    if not names or any(n in prev.held for n in variant.fixed):
        return False
    _assess(prev, data)
    if not prev.quality["describes_data"]:
        return False
    pos = [prev.spec.param_names.index(n) for n in names]
    cov_u = prev.covariance[np.ix_(pos, pos)] / prev.covar_scale
    d = np.array([prev.params[n] - float(variant.fixed[n]) for n in names])
    try:
        delta = float(d @ np.linalg.solve(cov_u, d))
    except np.linalg.LinAlgError:
        return False
    floor = 1.0 if data.sigma_F is not None else 0.0
    return bool((prev.chi2 + 0.5 * delta) / prev.n > _SCREEN_RATIO * max(prev.loo, floor))


#: a family that is a special case of another (landau: genjohnson with m = 1/3 and the peak
#: at 0 V, C0 = C_pk - C_fl and C_p = C_fl) -> (the freer family, what it fixes there, what
#: the freer fit must leave free to bound every variant of the nested one: landau's C_p is
#: genjohnson's floor)
_NESTED_IN = {"landau": ("genjohnson", {"m": 1.0 / 3.0, "V_pk_V": 0.0}, ("C_fl_F",))}


def _refuted_by_freer_law(spec: ModelSpec, fitted: Mapping, data: SweepData) -> str:
    """Why a family need not be fitted at all, or "": when it is a special case of a family
    fitted already (_NESTED_IN) and that fit refutes the special values, _decisively_worse's
    bound applies across the two: every variant of the nested law has a chi-square at least
    that of the freer law with those values fixed, so its leave-one-out score is above
    _SCREEN_RATIO times the freer fit's, and the nested law could be neither chosen, nor as
    good, nor a rival in the band. Only a freer fit that keeps free every parameter the
    nested law has free can bound it."""
    nest = _NESTED_IN.get(spec.name)
    if nest is None or nest[0] not in fitted:
        return ""
    family, values, must_be_free = nest
    freer = fitted[family]
    if freer.joint or any(n not in freer.free_names for n in must_be_free):
        return ""
    fixed = {n: v for n, v in values.items() if n in freer.free_names}
    if any(abs(freer.params[n] - v) > 0.0 for n, v in values.items() if n not in fixed):
        return ""  # fixed or held at another value in the freer fit: no bound
    variant = Variant(freer.spec, fixed, f"{freer.spec.name} with {spec.name}'s values")
    if not _decisively_worse(variant, freer, data):
        return ""
    return (f"it is {freer.spec.name} with "
            + ", ".join(f"{n} = {v:.4g}" for n, v in values.items())
            + f", values the {freer.label} fit refutes (its leave-one-out score would be over "
            f"{_SCREEN_RATIO:g} times that fit's)")


def _same_as_previous(variant: Variant, prev: VariantFit) -> bool:
    """True when the previous (freer) fit of the family ended with every parameter this
    variant fixes either fixed too or held on a bound at the same value: same fit again."""
    if prev.spec is not variant.spec:
        return False
    prev_fixed = set(prev.spec.param_names) - set(prev.free_names) - set(prev.held)
    if not prev_fixed <= set(variant.fixed):
        return False  # this variant is freer than the previous one
    for n, v in variant.fixed.items():
        if n in prev.free_names:
            return False
        if n in prev.held and abs(prev.params[n] - float(v)) > 0.0:
            return False
    return True


def _linear_loo(variants: list[Variant], data: SweepData) -> dict[int, tuple]:
    """index -> (squared weighted leave-one-out residuals, (R, Q^T y) of its coefficients)
    of each polynomial variant that the data determine: r_i/(1 - h_ii) from its QR
    solution, exact for a linear model (no refit per left-out point); the coefficients are
    solved only for a variant the choice looks at."""
    w = data.weights
    yw = data.C_F * w
    typical = float(np.sqrt(np.mean(yw**2)))
    Vs = float(variants[0].fixed["V_scale_V"])
    x = data.bias_V / Vs
    top = max(v.spec.degree for v in variants)
    X = x[:, None] ** np.arange(top + 1)[None, :] * w[:, None]
    out = {}
    # the variants are nested (degrees 0..d, even degrees 0..2m): the QR of a set of leading
    # columns is the leading part of the QR of them all, so one factorisation per nest
    # gives every variant's solution, hat diagonal and residuals
    nests: dict[tuple, tuple] = {}
    for i, v in enumerate(variants):
        powers = tuple(v.spec.powers)
        k = len(powers)
        if data.n <= k or data.n_distinct < k:
            continue
        step = 2 if k > 1 and powers[1] == 2 else 1
        nest = tuple(range(0, top + 1, step))
        if powers != nest[:k]:
            nest = powers
        if nest not in nests:
            Qn, Rn = np.linalg.qr(X[:, list(nest)])
            qb = Qn.T @ yw
            nests[nest] = (Qn, Rn, qb, np.cumsum(Qn * Qn, axis=1),
                           yw[:, None] - np.cumsum(Qn * qb[None, :], axis=1))
        Qn, Rn, qb, H, Res = nests[nest]
        R = Rn[:k, :k]
        d = np.abs(np.diag(R))
        if d.min() < _MIN_RCOND * d.max():
            continue
        out[i] = (_loo_from_hat(Res[:, k - 1], H[:, k - 1], typical), (R, qb[:k]))
    return out


def _linear_choice(variants: list[Variant], data: SweepData) -> Variant:
    """The polynomial variant chosen as _fit_family chooses, from the exact leave-one-out
    residuals of _linear_loo (no full fit per variant): the best by _choose whose curve does
    not turn where the data do not."""
    loo = _linear_loo(variants, data)
    scored = _scored_points(data.bias_V)
    scores = {i: sc[scored] for i, (sc, _) in loo.items()}
    triangles = {i: rq for i, (_, rq) in loo.items()}  # (R, Q^T y): solved when looked at
    keys = {i: (True, len(variants[i].spec.powers), 0, True) for i in loo}
    if not scores:
        return variants[0]
    Vs = float(variants[0].fixed["V_scale_V"])
    x = data.bias_V / Vs
    grid = np.linspace(x.min(), x.max(), _GRID)

    def curve(i):
        if variants[i].spec.degree == 0:
            return None  # a constant cannot turn
        dense = np.zeros(variants[i].spec.degree + 1)
        dense[list(variants[i].spec.powers)] = solve_triangular(*triangles[i], check_finite=False)
        return np.polynomial.polynomial.polyval(grid, dense), grid * Vs

    return variants[_smooth_choice(scores, keys, data, curve)]


def _smooth_choice(scores: dict, keys: dict, data: SweepData, curve):
    """_choose's first candidate whose curve does not turn where the data do not
    (_wiggles); curve(i) gives (C on a fine grid, that grid's biases), or None for a
    candidate that cannot turn. The scores and keys of refused candidates are dropped."""
    allowed = None
    tol = _turn_tol(data)
    while True:
        order, _ = _choose(scores, keys, weighted=data.sigma_F is not None)
        i = order[0]
        on_grid = curve(i) if len(scores) > 1 else None
        if on_grid is None:
            return i
        if allowed is None:  # only once a candidate has to be looked at
            allowed = quality.data_turns(data.bias_V, data.C_F, data.sigma_F)
        if not _wiggles(*on_grid, data, allowed, tol):
            return i
        del scores[i], keys[i]  # turns between the points where the data do not


def _spline_choice(variants: list[Variant], data: SweepData) -> Variant:
    """The regression-spline knot count chosen as _linear_choice chooses a degree: exact
    leave-one-out residuals per knot count from a QR of its (cheap, equivalent) power basis,
    the best by _choose whose curve does not turn where the data do not."""
    w = data.weights
    yw = data.C_F * w
    typical = float(np.sqrt(np.mean(yw**2)))
    scored = _scored_points(data.bias_V)
    grid = np.linspace(data.bias_V.min(), data.bias_V.max(), _GRID)
    scores, keys, curves = {}, {}, {}
    for i, v in enumerate(variants):
        spec = v.spec
        knots = np.array([float(v.fixed[f"V{j}_V"]) for j in range(spec.n_points)])
        k = spec.n_points
        if data.n <= k or data.n_distinct < k:
            continue
        X = spec.power_basis(data.bias_V, knots)
        norms = np.linalg.norm(X * w[:, None], axis=0)
        Qn, Rn = np.linalg.qr(X * w[:, None] / norms)
        d = np.abs(np.diag(Rn))
        if d.min() < _MIN_RCOND * d.max():
            continue
        qb = Qn.T @ yw
        scores[i] = _loo_from_hat(yw - Qn @ qb, np.sum(Qn * Qn, axis=1), typical)[scored]
        keys[i] = (True, k, 0, True)
        curves[i] = (knots, Rn, qb, norms)  # solved only for a count the choice looks at
    if not scores:
        return variants[0]

    def curve(i):
        knots, Rn, qb, norms = curves[i]
        coef = solve_triangular(Rn, qb, check_finite=False) / norms
        return variants[i].spec.power_basis(grid, knots) @ coef, grid

    return variants[_smooth_choice(scores, keys, data, curve)]


def _wiggles(C_grid, grid_V, data: SweepData, allowed: int, tol: float) -> bool:
    """True when a candidate's curve (on the fine grid grid_V) turns where the data do not:
    more turns than the data show (allowed), except one more inside the interval between
    the reading nearest 0 V and the next one when that end is an end of the sweep. A
    hysteretic branch peaks at its coercive bias, just off 0 V, often before the first step,
    where the readings either side cannot show it (the compact laws place that peak too,
    with V_pk); anywhere else an extremum the data do not show is a wiggle."""
    total = quality.turns(C_grid, tol)
    if total <= allowed:
        return False
    distinct = np.unique(data.bias_V)
    if total > allowed + 1 or distinct.size < 3:
        return True
    i0 = int(np.argmin(np.abs(distinct)))
    if i0 == 0:
        rest = grid_V >= distinct[1]
    elif i0 == distinct.size - 1:
        rest = grid_V <= distinct[-2]
    else:
        return True  # 0 V inside a bipolar sweep: a peak there is one the data show
    return quality.turns(np.asarray(C_grid)[rest], tol) > allowed


def _turn_tol(data: SweepData) -> float:
    """The swing below which a candidate's change of direction is not counted as a turn:
    twice the noise (no turn the data could refute) but at least 0.1 % of C, a ripple below
    any class-2 tolerance (IEC 60062 F is +-1 %) and below the accuracy a fit claims
    [common practice]."""
    floor = 1e-3 * float(np.max(data.C_F))
    return floor if data.sigma_F is None else max(floor, 2.0 * float(np.median(data.sigma_F)))


def _require_points(data: SweepData, k: int, label: str) -> None:
    if data.n <= k:
        raise _CannotFit(f"{label} needs at least {k + 1} points for its {k} free parameters, "
                         f"got {data.n}")
    if data.n_distinct < k:
        raise _CannotFit(f"{label} needs readings at {k} or more bias values for its {k} free "
                         f"parameters, got {data.n_distinct}")


def _scaled(name: str, value: float, Cs: float) -> float:
    return value / Cs if is_capacitance_param(name) else value


def _bounds(spec: ModelSpec, V, y):
    """(lower, upper) per parameter in the scaled space: the model's hints and data limits."""
    hints = spec.hints()
    lo = np.array([hints.get(n, {}).get("min", -np.inf) for n in spec.param_names], dtype=float)
    hi = np.array([hints.get(n, {}).get("max", np.inf) for n in spec.param_names], dtype=float)
    for n, (a, b) in spec.data_bounds(V, y).items():
        j = spec.param_names.index(n)
        lo[j], hi[j] = max(lo[j], a), min(hi[j], b)
    return lo, hi


def _fit_variant(variant: Variant, data: SweepData, start: Mapping | None = None,
                 chained: bool = False) -> VariantFit:
    """One variant; `start` = starting values in the scaled space (C / max C), else the
    model's guess; chained = start is the optimum of the previous variant of the family."""
    spec = variant.spec
    free = list(variant.free_names)
    _require_points(data, len(free), variant.label)
    if getattr(spec, "linear", False):
        return _fit_linear(variant, data)
    names = spec.param_names
    Cs = float(np.max(data.C_F))
    y = data.C_F / Cs
    w = np.ones(data.n) if data.sigma_F is None else Cs / data.sigma_F
    V = data.bias_V
    if start is None:
        start = spec.guess(V, y)
    lo, hi = _bounds(spec, V, y)
    x0 = np.array([_scaled(n, float(variant.fixed[n]), Cs) if n in variant.fixed
                   else float(start[n]) for n in names])
    fixed_idx = [j for j, n in enumerate(names) if n in variant.fixed]

    def resid(x):
        return (spec.C(V, **dict(zip(names, x))) - y) * w

    jac = None
    if spec.analytic_jacobian:
        def jac(x):
            return spec.jacobian(V, dict(zip(names, x))) * w[:, None]

    try:
        sol = solve(resid, jac, x0, lo, hi, fixed=fixed_idx, max_nfev=_MAX_NFEV, xtol=_TOL,
                    ftol=_TOL, hold_outward=chained)
    except SolveError as exc:
        raise _CannotFit(f"{variant.label}: the fit failed ({exc})") from None
    if not sol.converged:
        raise _CannotFit(f"{variant.label}: did not converge ({sol.message})")
    held = [names[j] for j in sol.held]
    free = [n for n in free if n not in held]
    values = {n: float(v) * (Cs if is_capacitance_param(n) else 1.0) for n, v in zip(names, sol.x)}
    try:
        spec.check_params(values)  # e.g. a peak capacitance that ran onto 0
    except ValueError as exc:
        raise _CannotFit(f"{variant.label}: the fit ended on an unphysical value ({exc})") from None
    free_idx = [names.index(n) for n in free]
    return _finish(variant.label, spec, values, spec.jacobian_of(V, values, free), free_idx,
                   tuple(free),
                   tuple(held), data, spec.C(V, **values))


def _fit_linear(variant: Variant, data: SweepData) -> VariantFit:
    """Exact weighted linear least squares for a model linear in its free parameters."""
    spec = variant.spec
    free = list(variant.free_names)
    # linear in the free parameters: the jacobian does not depend on their values, so no
    # guess is needed unless the variant leaves a parameter neither free nor fixed
    start = {n: 0.0 for n in free}
    start.update(variant.fixed)
    if set(start) != set(spec.param_names):
        start = dict(spec.guess(data.bias_V, data.C_F), **variant.fixed)
    idx = [spec.param_names.index(n) for n in free]
    A = spec.jacobian_of(data.bias_V, start, free)
    w = data.weights
    coef, *_ = np.linalg.lstsq(A * w[:, None], data.C_F * w, rcond=None)
    values = dict(start)
    values.update({n: float(c) for n, c in zip(free, coef)})
    values = {n: float(values[n]) for n in spec.param_names}
    return _finish(variant.label, spec, values, A, idx, tuple(free), (), data, A @ coef)


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


#: the end points' leave-one-out scores count only when fewer than this many points lie inside
_MIN_SCORED = 4


def _scored_points(V) -> np.ndarray:
    """Which points' leave-one-out scores the choice counts: those strictly inside the bias
    range. Leaving out an end point asks a candidate to extrapolate, and no curve here is
    ever used outside its measured range (Curve.valid_range_V), so how a law runs on beyond
    the last point says nothing about how well it interpolates; counted, those two scores
    (the largest, often by far) decided the choice for the law that extrapolates most
    tamely, not for the one that follows the curve (the falling branch with its turning
    point: tests/sweep/test_fit_against_truth.py). The end points still weigh in every fit.
    With fewer than _MIN_SCORED interior points every point counts."""
    V = np.asarray(V, dtype=float)
    inside = (V > V.min() + BIAS_GROUP_TOL_V) & (V < V.max() - BIAS_GROUP_TOL_V)
    return inside if int(inside.sum()) >= _MIN_SCORED else np.ones(V.shape, dtype=bool)


def _loo_scores(J_free, w, resid_w, cov_u, typical) -> np.ndarray:
    """Squared weighted leave-one-out residuals r_i/(1 - h_ii), h = Jw (Jw^T Jw)^-1 Jw^T."""
    Jw = J_free * w[:, None]
    return _loo_from_hat(resid_w, np.einsum("ij,jk,ik->i", Jw, cov_u, Jw), typical)


def _loo_from_hat(resid_w, h, typical) -> np.ndarray:
    """Squared leave-one-out residuals r_i/(1 - h_ii) from the weighted residuals and the hat
    diagonal (infinite where a point alone fixes the fit), floored at _LOO_FLOOR_REL."""
    with np.errstate(divide="ignore", invalid="ignore"):
        e = np.where(h < 1.0 - 1e-9, resid_w / (1.0 - h), np.inf)
    return np.maximum(e * e, (_LOO_FLOOR_REL * typical) ** 2)


def _finish(label, spec, values, J_free, free_idx, free, held, data, C_model) -> VariantFit:
    """Covariance (scaled per fits.statistics.covariance_scale), chi2, AIC/BIC and the
    leave-one-out scores."""
    w = data.weights
    cov_u = _unscaled_covariance(J_free, w, label)
    rw = (data.C_F - C_model) * w
    chi2, n, k = float(np.sum(rw**2)), data.n, len(free)
    chi2_red = chi2 / (n - k)
    scale = covariance_scale(chi2_red, data.sigma_F is not None)
    typical = float(np.sqrt(np.mean((data.C_F * w) ** 2)))
    aic, bic = information_criteria(chi2, n, k, typical)
    K = len(spec.param_names)
    cov = np.zeros((K, K))
    cov[np.ix_(free_idx, free_idx)] = cov_u * scale
    return VariantFit(label, spec, values, cov, free, held, chi2, n, k, chi2_red, scale, aic,
                      bic, C_model, _loo_scores(J_free, w, rw, cov_u, typical),
                      _scored_points(data.bias_V))


def _assess(vf: VariantFit, data: SweepData) -> None:
    """Lack-of-fit tests of the chosen fit on this branch (fits.quality)."""
    if vf.quality:
        return
    dof = data.n - (vf.k * data.n / vf.n if vf.joint else vf.k)
    q = quality.assess(data.bias_V, data.C_F - vf.C_model_F, data.sigma_F, int(round(dof)))
    q["flat"] = _is_flat(vf)
    vf.quality = q


def _rivals(fits: Mapping, order, table) -> list[VariantFit]:
    """The fits the data cannot tell from the chosen one (order[0]) at k = 2 (_choose's
    band_rival) and, when the chosen one describes the data, describing them too; with their
    own such variants."""
    first = fits[order[0]]
    out = []
    for row in table[1:]:
        f = fits.get(row["name"])
        if f is None or f is first or not row["band_rival"]:
            continue
        if first.quality.get("describes_data", True) and not f.quality.get("describes_data", True):
            continue
        out += [f] + [a for a in f.alternatives if a is not first]
    return out


def _model_choice_profile(vf: VariantFit, data: SweepData, rivals) -> np.ndarray:
    """Standard uncertainty of the choice between laws the data cannot tell apart, at
    CHOICE_NODES biases equally spaced over the measured range: the largest
    |C_rival - C_chosen| as the half-width of a rectangular distribution, u = a/sqrt(3)
    (JCGM 100:2008 4.3.7). Two laws that predict the unseen points equally well can still
    part between the points; the band there then spans both instead of trusting the one the
    tie-break picked, and stays narrow where they agree. Each node takes the largest gap on
    a fine grid between its neighbours, so the straight lines between nodes (Curve.u_C)
    never fall below the gap."""
    nodes = np.zeros(CHOICE_NODES)
    if not rivals:
        return nodes
    lo, hi = float(data.bias_V.min()), float(data.bias_V.max())
    if not hi > lo:
        return nodes
    grid = np.linspace(lo, hi, _GRID)
    C = vf.spec.C(grid, **vf.params)
    gap = np.max([np.abs(r.spec.C(grid, **r.params) - C) for r in rivals], axis=0)
    if not np.all(np.isfinite(gap)):
        return nodes
    pos = (grid - lo) / (hi - lo) * (CHOICE_NODES - 1)
    for j in range(CHOICE_NODES):
        near = np.abs(pos - j) <= 1.0
        nodes[j] = float(np.max(gap[near])) / np.sqrt(3.0)
    return nodes


def _finalise(vf: VariantFit, data: SweepData, rivals=()) -> None:
    """The chosen fit: its lack-of-fit tests and its band's model-error term: when its law
    does not describe the data, the excess scatter (fits.quality.model_error); when other laws
    or variants predict as well, their spread at each bias (_model_choice_profile)."""
    _assess(vf, data)
    if "model_error_F" in vf.quality:
        return
    lack = 0.0
    if not vf.quality["describes_data"]:
        dof = data.n - (vf.k * data.n / vf.n if vf.joint else vf.k)
        lack = quality.model_error(data.C_F - vf.C_model_F, data.sigma_F, int(round(dof)))
    profile = _model_choice_profile(vf, data, list(rivals) + list(vf.alternatives))
    vf.quality["model_choice_F"] = float(profile.max())
    vf.quality["model_choice_rivals"] = sorted({r.label for r in
                                                list(rivals) + list(vf.alternatives)})
    vf.choice_profile = profile if profile.max() > 0.0 else None
    vf.quality["model_error_F"] = float(lack)


# ---------------------------------------------------------------------------------------
# both branches of the tanh model with a shared shape


def _fit_tanh_shared(rising: SweepData, falling: SweepData) -> dict[str, VariantFit]:
    spec = models.get("tanh")
    label = "tanh, shared shape"
    shared = ("C_inf_F", "C_pk_F", "V0_V")
    n_total = rising.n + falling.n
    if n_total <= 5 or min(rising.n_distinct, falling.n_distinct) < 2:
        raise _CannotFit(f"{label} needs more than 5 points and 2 or more biases per branch")
    Cs = float(max(rising.C_F.max(), falling.C_F.max()))
    datas = {"rising": rising, "falling": falling}
    ys = {b: d.C_F / Cs for b, d in datas.items()}
    ws = {b: (np.ones(d.n) if d.sigma_F is None else Cs / d.sigma_F) for b, d in datas.items()}
    Vs = {b: d.bias_V for b, d in datas.items()}
    g_r, g_f = spec.guess(Vs["rising"], ys["rising"]), spec.guess(Vs["falling"], ys["falling"])
    names = shared + ("V_off_rising_V", "V_off_falling_V")
    x0 = np.array([0.5 * (g_r[n] + g_f[n]) for n in shared] + [g_r["V_off_V"], g_f["V_off_V"]])
    lo_s, hi_s = _bounds(spec, np.r_[Vs["rising"], Vs["falling"]],
                         np.r_[ys["rising"], ys["falling"]])
    pos = {n: spec.param_names.index(n) for n in spec.param_names}
    lo = np.array([lo_s[pos[n]] for n in shared] + [lo_s[pos["V_off_V"]]] * 2)
    hi = np.array([hi_s[pos[n]] for n in shared] + [hi_s[pos["V_off_V"]]] * 2)

    def branch_params(x, b):
        p = dict(zip(shared, x[:3]))
        p["V_off_V"] = x[3] if b == "rising" else x[4]
        return p

    def resid(x):
        return np.concatenate([(spec.C(Vs[b], **branch_params(x, b)) - ys[b]) * ws[b]
                               for b in BRANCHES])

    def joint_jac(x, weighted=True):
        """d(model)/d(joint parameter), rows rising then falling, columns in `names`."""
        blocks = []
        for b in BRANCHES:
            J = spec.jacobian(Vs[b], branch_params(x, b))
            if weighted:
                J = J * ws[b][:, None]
            full = np.zeros((J.shape[0], 5))
            full[:, :3] = J[:, :3]
            full[:, 3 if b == "rising" else 4] = J[:, 3]
            blocks.append(full)
        return np.vstack(blocks)

    try:
        sol = solve(resid, joint_jac, x0, lo, hi, max_nfev=_MAX_NFEV)
    except SolveError as exc:
        raise _CannotFit(f"{label}: the fit failed ({exc})") from None
    if not sol.converged:
        raise _CannotFit(f"{label}: did not converge ({sol.message})")
    held = [names[j] for j in sol.held]
    x = np.array([v * (Cs if is_capacitance_param(n) else 1.0) for n, v in zip(names, sol.x)])
    free_joint = [n for n in names if n not in held]
    free_idx = [names.index(n) for n in free_joint]
    w_all = np.concatenate([datas[b].weights for b in BRANCHES])
    J_all = joint_jac(x, weighted=False)[:, free_idx]
    cov_u = _unscaled_covariance(J_all, w_all, label)
    C_models = {b: spec.C(Vs[b], **branch_params(x, b)) for b in BRANCHES}
    rw = np.concatenate([(datas[b].C_F - C_models[b]) * datas[b].weights for b in BRANCHES])
    chi2 = float(np.sum(rw**2))
    k = len(free_joint)
    chi2_red = chi2 / (n_total - k)
    scale = covariance_scale(chi2_red, rising.sigma_F is not None)
    C_all = np.concatenate([datas[b].C_F * datas[b].weights for b in BRANCHES])
    typical = float(np.sqrt(np.mean(C_all**2)))
    aic, bic = information_criteria(chi2, n_total, k, typical)
    loo = _loo_scores(J_all, w_all, rw, cov_u, typical)
    cov_joint = np.zeros((5, 5))
    cov_joint[np.ix_(free_idx, free_idx)] = cov_u * scale

    def own(name_list, b):
        """Joint names of branch b as the tanh model names them."""
        return tuple(n if n in shared else "V_off_V" for n in name_list
                     if n in shared or n == f"V_off_{b}_V")

    out = {}
    for b in BRANCHES:
        sel = [0, 1, 2, 3 if b == "rising" else 4]
        p = branch_params(x, b)
        rows = slice(0, rising.n) if b == "rising" else slice(rising.n, n_total)
        out[b] = VariantFit(
            label, spec, {n: float(p[n]) for n in spec.param_names},
            cov_joint[np.ix_(sel, sel)], own(free_joint, b), own(held, b), chi2, n_total, k,
            chi2_red, scale, aic, bic, C_models[b], loo[rows], _scored_points(Vs[b]),
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
    return FitOutcome(curve, ranking, report, data, vf, {"table": vf}, {}, meta)


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
    if vf.loo_scores is not None:
        rms = float(np.sqrt(vf.loo))
        stats["loo_rms"] = rms
    model_error = 0.0
    if vf.quality:
        from fits.report import verdict

        stats.update(vf.quality)
        model_error = float(vf.quality.get("model_error_F") or 0.0)
        stats["verdict"] = verdict(stats)
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
                 branch=meta.get("branch"), param_names=vf.spec.param_names,
                 model_error_F=model_error,
                 model_choice_u_F=None if vf.choice_profile is None else vf.choice_profile.tolist())


def _report(branch, data, vf, curve, ranking, skipped, *, auto, notes=(), combined=False):
    head = format_ranking(ranking, skipped, auto=auto, combined=combined)
    return format_fit_report(branch, data, vf, curve, head, list(notes))
