"""Statistics of a lot: N samples measured at the same bias points.

Why separate from the decision: the spread and the worst sample tell the engineer how close
the lot runs to the claim, which a pass/fail count hides.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from benchkit.errors import UserError
from benchkit.verify.decision import CONFORMING, NONCONFORMING, NOT_DECIDABLE, combine_verdicts
from benchkit.verify.sampling import SamplingPlan, lot_decision


@dataclass
class LotSummary:
    """Per-bias statistics over the samples; NaN where a sample has no value at that bias."""

    sample_ids: list[str]
    bias_V: np.ndarray
    mean_C_F: np.ndarray
    std_C_F: np.ndarray  # experimental standard deviation between samples (ddof = 1)
    min_C_F: np.ndarray
    max_C_F: np.ndarray
    n_per_bias: np.ndarray
    worst_sample_id: str | None
    worst_score: float  # largest |deviation| / half-width of the band, over its points

    def to_curve(self, part_id: str):
        """The lot's mean curve as a fits table curve (origin "lot summary"), each point with
        the standard uncertainty of a mean, s/sqrt(n) (JCGM 100:2008 4.2.3); biases that not
        every sample reached, or with fewer than two samples, are left out."""
        from fits import Curve

        ok = np.isfinite(self.mean_C_F) & np.isfinite(self.std_C_F) & (self.n_per_bias >= 2)
        if np.count_nonzero(ok) < 2:
            raise UserError("a lot summary curve needs at least 2 biases measured on 2 or more samples")
        u = self.std_C_F[ok] / np.sqrt(self.n_per_bias[ok])
        return Curve.from_points(self.bias_V[ok], self.mean_C_F[ok], u, origin="lot summary",
                                 part_id=part_id)

    def to_dict(self) -> dict:
        def clean(a):
            return [None if not np.isfinite(x) else float(x) for x in np.asarray(a, dtype=float)]
        return {"sample_ids": list(self.sample_ids), "bias_V": clean(self.bias_V),
                "mean_C_F": clean(self.mean_C_F), "std_C_F": clean(self.std_C_F),
                "min_C_F": clean(self.min_C_F), "max_C_F": clean(self.max_C_F),
                "n_per_bias": [int(n) for n in self.n_per_bias],
                "worst_sample_id": self.worst_sample_id,
                "worst_score": None if not np.isfinite(self.worst_score) else float(self.worst_score)}


def summarise(sample_ids, bias_V, values_F, reference_F=None, lower_F=None, upper_F=None) -> LotSummary:
    """Mean curve, spread and worst sample of a lot.

    values_F: array (n_samples, n_bias), NaN where not measured. The worst sample is the one
    whose value strays furthest from reference_F in units of the band's half-width on that
    side (so +0.9 means 90 % of the way to the upper limit); without a band, the one with the
    largest relative deviation from the lot mean.
    """
    ids = list(sample_ids)
    v = np.asarray(values_F, dtype=float)
    b = np.asarray(bias_V, dtype=float)
    if v.ndim != 2 or v.shape != (len(ids), b.size):
        raise UserError(f"lot values must be {len(ids)} samples x {b.size} biases, got {v.shape}")
    if not ids:
        raise UserError("a lot summary needs at least one sample")
    n = np.sum(np.isfinite(v), axis=0)
    with warnings.catch_warnings():  # all-NaN columns (a bias no sample reached) stay NaN
        warnings.simplefilter("ignore", category=RuntimeWarning)
        mean = np.nanmean(v, axis=0)
        std = np.nanstd(v, axis=0, ddof=1) if len(ids) >= 2 else np.full(b.size, np.nan)
        std = np.where(n >= 2, std, np.nan)
        vmin = np.nanmin(v, axis=0)
        vmax = np.nanmax(v, axis=0)
    ref = mean if reference_F is None else np.asarray(reference_F, dtype=float)
    dev = v - ref
    if lower_F is not None and upper_F is not None:
        lo = np.asarray(lower_F, dtype=float)
        hi = np.asarray(upper_F, dtype=float)
        half = np.where(dev >= 0, hi - ref, ref - lo)
        score = np.abs(dev) / half
    else:
        score = np.abs(dev) / np.abs(ref)
    per_sample = np.array([np.nanmax(s) if np.any(np.isfinite(s)) else -np.inf for s in score])
    if np.all(~np.isfinite(per_sample)):
        worst_id, worst = None, float("nan")
    else:
        i = int(np.argmax(per_sample))
        worst_id, worst = ids[i], float(per_sample[i])
    return LotSummary(ids, b, mean, std, vmin, vmax, n, worst_id, worst)


@dataclass(frozen=True)
class LotVerdict:
    verdict: str
    n_samples: int
    n_conforming: int
    n_nonconforming: int
    n_not_decidable: int
    rule: str  # how the sample verdicts were turned into the lot's

    def to_dict(self) -> dict:
        return dict(self.__dict__)


def lot_verdict(sample_verdicts, plan: SamplingPlan | None = None) -> LotVerdict:
    """The lot's verdict from its samples'.

    Without a sampling plan every measured sample must conform (acceptance number 0 over the
    samples measured). With an ISO 2859-1 plan, the counts are judged against its Ac/Re, and
    undecided samples count as possibly nonconforming (see sampling.lot_decision).
    """
    vs = list(sample_verdicts)
    n_nc = vs.count(NONCONFORMING)
    n_nd = vs.count(NOT_DECIDABLE)
    n_ok = vs.count(CONFORMING)
    if plan is None:
        verdict = combine_verdicts(vs)
        rule = "every measured sample must conform (acceptance number 0)"
    else:
        verdict = lot_decision(plan, len(vs), n_nc, n_nd)
        rule = (f"ISO 2859-1 single sampling, normal inspection, level {plan.level}, "
                f"AQL {plan.aql_pct:g} %: code letter {plan.letter}, n = {plan.n}, "
                f"Ac = {plan.Ac}, Re = {plan.Re}")
        if len(vs) < plan.n:
            rule += f" ({len(vs)} of the {plan.n} samples the plan asks for were measured)"
    return LotVerdict(verdict, len(vs), n_ok, n_nc, n_nd, rule)
