"""Model choice by prediction, lack of fit that is never silent, flat parts, no wiggles,
polarity, and fits on shapes none of the models is.

Truths: the shape families of benchkit.benchmarks.independent_truths (invented for these
checks, none of them a model of fits nor the simulated bench's law), the tanh and Landau-type
laws for the "describes within noise" cases (Chen and Yu 2004; Johnson 1962), and a flat
class-1 part (C0G: 0 +-30 ppm/K, no DC-bias dependence [common practice]).
Runs test: A. Wald and J. Wolfowitz, Ann. Math. Stat. 11, 147 (1940); reference values from
scipy.stats (normal distribution) below.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats

from benchkit.benchmarks import independent_truths as T
from fits import Curve, OutOfRange, fit_branches, fit_sweep, models, quality

GRID = np.linspace(0.0, T.TOP_V, 400)


def test_runs_test_against_the_normal_approximation_formula():
    # Wald-Wolfowitz: n1 = n2 = 10 -> mean runs 11, variance 4.737 (formula; reference
    # values by scipy.stats.norm); 4 runs observed
    signs = [1] * 5 + [-1] * 5 + [1] * 5 + [-1] * 5
    runs, mu, p = quality.runs_test(np.array(signs, dtype=float))
    var = 2 * 10 * 10 * (2 * 10 * 10 - 20) / (20**2 * 19)
    assert (runs, mu) == (4, 11.0)
    assert p == pytest.approx(stats.norm.cdf((4 - 11 + 0.5) / np.sqrt(var)), rel=1e-12)


def test_model_error_makes_chi_square_meet_its_expectation():
    rng = np.random.default_rng(3)
    sigma = np.full(30, 1e-9)
    r = rng.normal(size=30) * 3e-9  # three times the stated noise
    s_m = quality.model_error(r, sigma, 28)
    assert np.sum(r**2 / (sigma**2 + s_m**2)) == pytest.approx(28, rel=1e-6)


def test_forced_tanh_on_a_shape_it_cannot_follow_says_so_and_its_band_covers_the_truth(tmp_path):
    V, C, s, br = T.sweep("stretched-exp", 0)
    m = br == "rising"
    out = fit_sweep(V[m], C[m], s[m], model="tanh", branch="rising")
    c = out.curve
    assert c.stats["describes_data"] is False
    assert "LACK OF FIT" in out.report and "model-error term" in out.report
    assert c.model_error_F > 0
    truth = T.truth("stretched-exp", GRID, "rising")
    assert np.mean(np.abs(c.C(GRID) - truth) <= 2 * c.u_C(GRID)) >= 0.9
    # the curve document says it too, and keeps the model error through a save/load
    c.save(tmp_path / "c.json")
    doc = json.loads((tmp_path / "c.json").read_text())
    assert doc["stats"]["describes_data"] is False and "LACK OF FIT" in doc["stats"]["verdict"]
    back = Curve.load(tmp_path / "c.json")
    assert back.model_error_F == c.model_error_F
    np.testing.assert_allclose(back.u_C(GRID), c.u_C(GRID), rtol=1e-12)


@pytest.mark.parametrize("name, truth", [
    ("tanh", dict(C_inf_F=1e-6, C_pk_F=10e-6, V0_V=6.0, V_off_V=0.0)),
    ("landau", dict(C0_F=4.7e-6, V_k_V=3.0, C_p_F=0.0)),
])
def test_auto_picks_a_compact_law_on_sweeps_one_describes_within_noise(name, truth):
    # 11 points per branch at 0.3 % noise, as the sparse sweeps of the issue
    V = np.linspace(0, 25, 11)
    C_true = models.get(name).C(V, **truth)
    for seed in range(5):
        rng = np.random.default_rng(seed)
        sigma = 0.003 * C_true
        out = fit_sweep(V, C_true + rng.normal(size=V.size) * sigma, sigma)
        assert out.curve.spec.compact, (seed, out.curve.stats["variant"])
        assert out.curve.stats["describes_data"]
        # and its k = 2 band covers the generating law
        err = np.abs(out.curve.C(GRID) - models.get(name).C(GRID, **truth))
        assert np.mean(err <= 2 * out.curve.u_C(GRID)) >= 0.9, seed


def test_a_part_flat_within_noise_is_reported_flat():
    # C0G: no DC-bias dependence [common practice]; 0.3 % noise on 100 nF
    rng = np.random.default_rng(8)
    V = np.linspace(0, 50, 11)
    C = 100e-9 * (1 + 0.003 * rng.normal(size=V.size))
    out = fit_sweep(V, C, 0.003 * 100e-9 * np.ones(V.size))
    assert out.curve.stats["flat"] and out.curve.stats["describes_data"]
    assert "flat within noise" in out.report
    assert out.curve.stats["variant"] == "poly degree 0 (flat)"
    # a real fall of 3 % over the range is not called flat
    out = fit_sweep(V, C * (1 - 0.03 * V / 50), 0.003 * 100e-9 * np.ones(V.size))
    assert not out.curve.stats["flat"]


def test_flat_within_noise_is_decided_as_a_weighted_constant_fit_and_its_tests_decide_it():
    # the rule that puts the flat line first (fits.fitting._flat_first), against a reference:
    # the weighted least-squares constant by numpy.linalg.lstsq, its chi-square p-value by
    # scipy.stats.chi2.sf and the runs test of its residuals, both at p >= 0.05; slopes from
    # none to 2 % over the range, so both answers occur
    from fits.fitting import _flat_first
    from fits.sweepdata import check_sweep

    rng = np.random.default_rng(21)
    V = np.linspace(0, 50, 11)
    said = {True: 0, False: 0}
    for k in range(60):
        fall = [0.0, 0.002, 0.005, 0.01, 0.02][k % 5]
        sigma = 0.003 * 100e-9 * (1 + 0.5 * rng.random(V.size))
        C = 100e-9 * (1 - fall * V / 50) + sigma * rng.normal(size=V.size)
        w = 1 / sigma
        c0 = np.linalg.lstsq(w[:, None], C * w, rcond=None)[0][0]
        r = C - c0
        p_chi2 = stats.chi2.sf(float(np.sum((r * w) ** 2)), V.size - 1)
        p_runs = quality.runs_test(r)[2]
        flat = bool(p_chi2 >= 0.05 and p_runs >= 0.05)
        fitted = {"poly": None}
        order, _ = _flat_first(fitted, check_sweep(V, C, sigma), ["tanh", "poly"], [])
        put_first = order[0] == "poly" and fitted["poly"] is not None
        assert put_first == flat, k
        if flat:
            assert fitted["poly"].label == "poly degree 0 (flat)"
            assert fitted["poly"].params["a0_F"] == pytest.approx(c0, rel=1e-12)
        said[flat] += 1
    assert min(said.values()) >= 10, said


def test_no_polynomial_wiggles_between_the_points():
    # every auto fit of the independent truths: the curve on a fine grid turns no more often
    # than the truth does by more than the noise (the truths fall monotonically on 0..top
    # except the rising branch's peak near 0 V, less than one step wide)
    for fam in T.FAMILIES:
        for seed in range(2):
            V, C, s, br = T.sweep(fam, seed)
            out = fit_branches(V, C, br, s)
            for b, o in out.outcomes.items():
                curve = o.curve.C(GRID)
                assert quality.turns(curve, 2 * 0.003 * float(curve.max())) <= 1, (fam, b)


def test_positive_only_curve_refuses_negative_bias_even_when_extrapolating():
    V = np.linspace(0, 12, 13)
    c = fit_sweep(V, 1e-6 / (1 + (V / 5) ** 2)).curve
    assert c.measured_polarity == "positive"
    with pytest.raises(OutOfRange, match="polarity"):
        c.C(-12.0, extrapolate=True)
    with pytest.raises(OutOfRange, match="polarity"):
        c.u_C(-0.5, extrapolate=True)
    assert np.isfinite(c.C(13.0, extrapolate=True))  # same polarity: told to, it extrapolates


@pytest.mark.xfail(strict=True, reason="not met: on 11-point branches at 0.3 % noise the auto "
                   "fits of these four shape families reach 0.6-1.9 % of C0, worst where the "
                   "peak lies between 0 V and the first step, and a single fit's k = 2 band can "
                   "miss up to 24 % of the grid (pooled: 98 % covered); the generating law fitted "
                   "with itself, same protocol, still passes 0.5 % in 10-12 % of fits (numbers "
                   "in `make bench`, independent_truths)")
def test_independent_truths_within_half_a_percent_and_covered():
    rows = T.run_cases(range(3))
    for r in rows:
        assert r["max_err_pct_C0"] <= 0.5, r
        assert r["coverage"] >= 0.9, r


def _rival_gap(outcome, grid):
    """The largest |C_rival - C_chosen| on the grid over the laws named as rivals."""
    c = outcome.curve
    rivals = set(c.stats["model_choice_rivals"])
    fits = [f for f in outcome.candidate_fits.values() if f.label in rivals]
    fits += [a for f in outcome.candidate_fits.values() for a in f.alternatives if a.label in rivals]
    assert fits, "a rival named in the stats must be among the fitted candidates"
    return np.max([np.abs(f.spec.C(grid, **f.params) - c.C(grid)) for f in fits], axis=0)


def test_model_choice_term_follows_where_rival_laws_part():
    # 11 readings of a stretched-exponential peak between the first two readings (an
    # independent truth, benchkit/benchmarks/independent_truths.py; 0.3 % scatter, seeded).
    # The model-choice term at every bias is at least the gap to the rival laws there over
    # sqrt(3) (rectangular half-width, JCGM 100:2008 4.3.7), and where the laws agree it
    # adds (nearly) nothing: it is a profile, not one number for the whole range.
    V, C, s, br = T.sweep("stretched-exp", 3)
    out = fit_branches(V, C, br, s).outcomes["rising"]
    c = out.curve
    grid = np.linspace(*c.valid_range_V, 801)
    gap = _rival_gap(out, grid)
    # (to the sampling of the fit's own 400-point grid: 0.1 % between its points)
    assert np.all(c.model_choice_at(grid) >= gap / np.sqrt(3.0) * (1 - 1e-3))
    prof = np.asarray(c.model_choice_u_F)
    assert prof.max() > 5 * prof.min()  # wide where they part, narrow where they agree
    assert c.stats["model_choice_F"] == pytest.approx(prof.max())
    back = Curve.from_json(c.to_json())
    assert np.allclose(back.u_C(grid), c.u_C(grid), rtol=1e-12)


def test_band_with_model_choice_profile_covers_independent_truths():
    # Coverage of the k = 2 band against four shape families that are none of the models
    # (independent_truths: 11 points a branch, 0.3 % noise, seeds 0-4): pooled over the grids
    # at least 95 % (a k = 2 band's nominal level, JCGM 100 6.3.3), and the band carries its
    # model-choice profile. Control: the same fits with the profile removed cover less, so the
    # profile is what does it.
    covered, covered_without, n = 0, 0, 0
    for fam in T.FAMILIES:
        for seed in range(5):
            V, C, s, br = T.sweep(fam, seed)
            for b, o in fit_branches(V, C, br, s).outcomes.items():
                c = o.curve
                grid = np.linspace(*c.valid_range_V, T.GRID)
                err = np.abs(c.C(grid) - T.truth(fam, grid, b))
                covered += int(np.sum(err <= 2 * c.u_C(grid)))
                bare = Curve.from_dict(dict(c.to_dict(), model_choice_u_F=None))
                covered_without += int(np.sum(err <= 2 * bare.u_C(grid)))
                n += grid.size
    assert covered / n >= 0.95
    assert covered_without < covered - 0.01 * n
