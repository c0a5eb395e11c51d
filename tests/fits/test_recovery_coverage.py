"""Synthetic truth: noise-free curves give their parameters back; noisy ones give standard
errors that cover the truth about as often as a 1-sigma interval should (68.27 %).

Coverage bounds: with N = 200 seeded draws the count of covering draws is binomial(N, p);
for p = 0.6827 its standard deviation is sqrt(p(1-p)/N) = 3.3 %, so we accept 0.575..0.790
(+-3.3 standard deviations, two-sided 99.9 %) [common practice: binomial interval].
"""

from __future__ import annotations

import numpy as np
import pytest

from fits import fit_branches, fit_sweep, models

P_1SIGMA = 0.6827  # normal probability within +-1 sigma
N_DRAWS = 200
LOW, HIGH = 0.575, 0.790


@pytest.mark.parametrize("truth, V", [
    (dict(C_inf_F=1.1e-6, C_pk_F=10e-6, V0_V=1.9, V_off_V=0.0), np.linspace(0, 6.3, 20)),
    (dict(C_inf_F=0.4e-6, C_pk_F=4.7e-6, V0_V=3.0, V_off_V=-0.8), np.linspace(-10, 10, 31)),
])
def test_tanh_noise_free_recovery(truth, V):
    spec = models.get("tanh")
    out = fit_sweep(V, spec.C(V, **truth), model="tanh")
    for n, v in truth.items():
        assert out.curve.params[n] == pytest.approx(v, rel=1e-8, abs=1e-9)


@pytest.mark.parametrize("truth", [
    dict(C0_F=22e-6, V_k_V=0.9, C_p_F=0.0),
    dict(C0_F=4.0e-6, V_k_V=2.5, C_p_F=1.0e-6),
])
def test_landau_noise_free_recovery_and_C_p_choice(truth):
    # C_p is kept only when the data call for it (BIC): absent in the first truth, present in
    # the second
    spec = models.get("landau")
    V = np.linspace(0, 16, 25)
    out = fit_sweep(V, spec.C(V, **truth), model="landau")
    for n, v in truth.items():
        assert out.curve.params[n] == pytest.approx(v, rel=1e-8, abs=1e-15)
    assert ("C_p_F" in out.fit.free_names) == (truth["C_p_F"] > 0)


def test_poly_noise_free_picks_true_degree():
    V = np.linspace(0, 5, 21)
    true = [10e-6, -2e-6, -1e-6, 0.15e-6]  # cubic in x = V/5
    C = np.polynomial.polynomial.polyval(V / 5.0, true)
    out = fit_sweep(V, C, model="poly")
    assert out.curve.spec.powers == (0, 1, 2, 3)
    for k, a in enumerate(true):
        assert out.curve.params[f"a{k}_F"] == pytest.approx(a, rel=1e-9)


def test_poly_even_when_bipolar_symmetric():
    # an even C(V) sampled symmetrically about 0 V: the even-only polynomial wins
    V = np.linspace(-6, 6, 25)
    C = 10e-6 * (1 - 0.5 * (V / 6) ** 2 + 0.1 * (V / 6) ** 4)
    out = fit_sweep(V, C, model="poly")
    assert out.curve.spec.powers == (0, 2, 4)


def test_auto_picks_the_generating_law():
    rng = np.random.default_rng(9)
    V = np.linspace(0, 10, 30)
    for name, truth in (("tanh", dict(C_inf_F=1e-6, C_pk_F=10e-6, V0_V=2.0, V_off_V=0.0)),
                        ("landau", dict(C0_F=10e-6, V_k_V=1.0, C_p_F=0.0))):
        C = models.get(name).C(V, **truth)
        sigma = 0.002 * C
        out = fit_sweep(V, C + rng.normal(size=V.size) * sigma, sigma)
        assert out.ranking[0][0] == name
        # after the chosen law the others follow by leave-one-out score (lowest first)
        assert [r[1] for r in out.ranking[1:]] == sorted(r[1] for r in out.ranking[1:])
        assert out.curve.stats["describes_data"]


def _coverage(spec_name, truth, V, rel_noise, weighted, seed):
    spec = models.get(spec_name)
    rng = np.random.default_rng(seed)
    C_true = spec.C(V, **truth)
    sigma = rel_noise * C_true
    hits = {n: 0 for n in truth}
    for _ in range(N_DRAWS):
        C = C_true + rng.normal(size=V.size) * sigma
        out = fit_sweep(V, C, sigma if weighted else None, model=spec_name)
        u = out.curve.stderr
        for n, v in truth.items():
            hits[n] += abs(out.curve.params[n] - v) <= u[n]
    return {n: h / N_DRAWS for n, h in hits.items()}


def test_tanh_weighted_coverage():
    # known sigma, covariance scaled by max(1, chi2_red) (Birge ratio): coverage near, or a
    # little above, 68.27 %
    truth = dict(C_inf_F=1.2e-6, C_pk_F=10e-6, V0_V=1.8, V_off_V=0.25)
    cov = _coverage("tanh", truth, np.linspace(-1, 6.3, 24), 0.003, True, seed=2024)
    print("tanh weighted coverage:", cov)
    for n, frac in cov.items():
        assert LOW <= frac <= HIGH, (n, frac)


def test_landau_unweighted_coverage():
    # unknown sigma, covariance scaled by the residual variance: expected coverage is
    # P(|t_dof| < 1) = 0.67 for dof = 20 (Student t), inside the same bounds. Unit weights
    # assume the same noise at every bias, so the noise here is additive (homoscedastic)
    truth = dict(C0_F=6.8e-6, V_k_V=1.5, C_p_F=0.0)
    spec = models.get("landau")
    rng = np.random.default_rng(77)
    V = np.linspace(0, 12, 22)
    C_true = spec.C(V, **truth)
    hits = {"C0_F": 0, "V_k_V": 0}
    variant = spec.variants(V, C_true)[0]  # C_p held at 0: the law that generated the data
    assert variant.fixed == {"C_p_F": 0.0}
    from fits.fitting import _fit_variant
    from fits.sweepdata import check_sweep

    for _ in range(N_DRAWS):
        C = C_true + 0.004 * truth["C0_F"] * rng.normal(size=V.size)
        vf = _fit_variant(variant, check_sweep(V, C))
        u = np.sqrt(np.diag(vf.covariance))
        for j, n in enumerate(spec.param_names):
            if n in hits:
                hits[n] += abs(vf.params[n] - truth[n]) <= u[j]
    cov = {n: h / N_DRAWS for n, h in hits.items()}
    print("landau unweighted coverage:", cov)
    for n, frac in cov.items():
        assert LOW <= frac <= HIGH, (n, frac)


def test_repeat_scatter_weights_estimate_the_noise():
    # three repeats per bias, 0.5 % relative noise: the pooled relative scatter recovers it
    # (within the sampling error of a variance with 2*21 = 42 degrees of freedom, ~11 %)
    spec = models.get("tanh")
    truth = dict(C_inf_F=1e-6, C_pk_F=10e-6, V0_V=2.0, V_off_V=0.0)
    V = np.repeat(np.linspace(0, 6, 21), 3)
    rng = np.random.default_rng(12)
    C = spec.C(V, **truth) * (1 + 0.005 * rng.normal(size=V.size))
    out = fit_sweep(V, C, model="tanh")
    assert out.data.weighting == "repeat scatter"
    rel = out.data.sigma_F / spec.C(V, **truth)
    assert np.median(rel) == pytest.approx(0.005, rel=0.35)


def test_miller_branches_give_shared_shape_and_coercive_offsets():
    # Miller et al., J. Appl. Phys. 68, 6463 (1990): P+(E) = Ps*tanh((E - Ec)/(2*delta)),
    # P-(E) = -P+(-E), delta = Ec/ln((1 + Pr/Ps)/(1 - Pr/Ps)). Ps = 1, Pr = 0.5, Ec = 1 gives
    # delta = 0.910239 and dP+/dE at Ec = 0.549306 [derived]. The capacitance of each branch is
    # the sech^2 peak at +-Ec: our tanh model with V_off = +-Ec, V0 = 2*delta,
    # C_pk - C_inf = Ps/(2*delta). A linear background C_inf = 0.2 is added.
    Ps, Pr, Ec = 1.0, 0.5, 1.0
    delta = Ec / np.log((1 + Pr / Ps) / (1 - Pr / Ps))
    assert delta == pytest.approx(0.910239, abs=5e-7)
    up = np.linspace(-5, 5, 41)
    down = up[::-1]
    h = 1e-6

    def P_plus(E):
        return Ps * np.tanh((E - Ec) / (2 * delta))

    def P_minus(E):
        return -P_plus(-E)

    C_up = 0.2 + (P_plus(up + h) - P_plus(up - h)) / (2 * h)
    C_dn = 0.2 + (P_minus(down + h) - P_minus(down - h)) / (2 * h)
    assert (P_plus(Ec + h) - P_plus(Ec - h)) / (2 * h) == pytest.approx(0.549306, abs=5e-7)
    out = fit_branches(np.r_[up, down], np.r_[C_up, C_dn], ["rising"] * 41 + ["falling"] * 41,
                       model="tanh")
    r, f = out.curves["rising"], out.curves["falling"]
    assert r.params["V_off_V"] == pytest.approx(Ec, rel=1e-6)
    assert f.params["V_off_V"] == pytest.approx(-Ec, rel=1e-6)
    for c in (r, f):
        assert c.params["V0_V"] == pytest.approx(2 * delta, rel=1e-6)
        assert c.params["C_pk_F"] - c.params["C_inf_F"] == pytest.approx(0.549306, abs=1e-6)
        assert c.params["C_inf_F"] == pytest.approx(0.2, rel=1e-6)
    assert out.primary is r and r.branch == "rising"
