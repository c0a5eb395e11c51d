"""The shortcuts that make model="auto" fast must not change what it computes or chooses.

- The polynomial leave-one-out residuals come from one QR per nest of variants and the hat
  matrix; they must equal brute-force leave-one-out refits (numpy.linalg.lstsq without the
  point) [published: the leave-one-out identity e_i = r_i/(1 - h_ii) of linear least
  squares, standard regression texts].
- A simpler variant of a family is skipped when the freer fit shows it cannot be chosen
  (fits.fitting._decisively_worse); fitting every variant must give the same choice.
- A family that is a special case of another (landau: genjohnson with m = 1/3 and the peak
  at 0 V) is not fitted when the freer law's fit refutes those values
  (fits.fitting._refuted_by_freer_law): the choice, the rivals in the band and the band
  itself must be those of fitting every family.
"""

from __future__ import annotations

import numpy as np
import pytest

import fits.fitting as fitting
from fits import fit_sweep, models


def _sweeps():
    """Shapes that are none of the models (own test truths), noise 0.1-1 %, 9-41 points."""
    rng = np.random.default_rng(20261202)
    out = []
    for j in range(12):
        n = int(rng.integers(9, 42))
        top = float(rng.choice([6.3, 16.0, 25.0, 50.0]))
        V = np.linspace(-top if j % 4 == 0 else 0.0, top, n)
        u = V / (rng.uniform(0.2, 1.2) * top)
        shape = j % 3
        if shape == 0:
            C = 0.3 + 0.7 * np.exp(-np.abs(u) ** 1.6)  # stretched exponential
        elif shape == 1:
            C = 0.35 + 0.65 / (1.0 + np.abs(u) ** 2.4)  # Hill-type fall
        else:
            C = 1.0 - 0.6 * np.tanh(u * u)  # tanh of the square
        noise = float(rng.choice([1e-3, 3e-3, 1e-2]))
        C = 1e-6 * C * (1.0 + noise * rng.standard_normal(n))
        sigma = noise * C if j % 2 else None
        out.append((V, C, sigma))
    return out


def _peaked_sweeps():
    """One branch each of the independent test truths (benchkit/benchmarks/
    independent_truths.py: four shapes none of the models is, 11 points, 0.3 % noise, sigma
    given), where the genjohnson fit often refutes landau's fixed exponent."""
    from benchkit.benchmarks import independent_truths as T

    out = []
    for fam in T.FAMILIES:
        for seed in range(3):
            V, C, s, br = T.sweep(fam, seed)
            for b in ("rising", "falling"):
                m = br == b
                out.append((V[m], C[m], s[m]))
    return out


SWEEPS = _sweeps() + _peaked_sweeps()


@pytest.mark.parametrize("k", range(len(SWEEPS)))
def test_polynomial_leave_one_out_equals_refitting_without_each_point(k):
    V, C, sigma = SWEEPS[k]
    data = fitting.check_sweep(V, C, sigma)
    variants = models.get("poly").variants(V, C)
    loo = fitting._linear_loo(variants, data)
    assert loo  # at least one variant is determined
    w = data.weights
    Vs = float(variants[0].fixed["V_scale_V"])
    for i, (scores, _) in loo.items():
        powers = list(variants[i].spec.powers)
        X = (V / Vs)[:, None] ** np.array(powers)[None, :] * w[:, None]
        y = C * w
        brute = np.empty(V.size)
        for m in range(V.size):
            keep = np.arange(V.size) != m
            coef = np.linalg.lstsq(X[keep], y[keep], rcond=None)[0]
            brute[m] = (y[m] - X[m] @ coef) ** 2
        floor = (fitting._LOO_FLOOR_REL * np.sqrt(np.mean(y**2))) ** 2
        np.testing.assert_allclose(scores, np.maximum(brute, floor), rtol=1e-6,
                                   atol=1e-9 * float(np.max(brute)))


@pytest.mark.parametrize("k", range(len(SWEEPS)))
def test_screening_of_simpler_variants_does_not_change_the_choice(k, monkeypatch):
    V, C, sigma = SWEEPS[k]
    fast = fit_sweep(V, C, sigma, model="auto")
    monkeypatch.setattr(fitting, "_decisively_worse", lambda *a, **k: False)
    full = fit_sweep(V, C, sigma, model="auto")
    assert fast.curve.model == full.curve.model
    assert fast.curve.stats["variant"] == full.curve.stats["variant"]
    for name in full.curve.param_names:
        assert fast.curve.params[name] == pytest.approx(full.curve.params[name], rel=1e-7,
                                                        abs=1e-15)
    # and every family fitted makes the same choice of variant; a family not fitted was
    # neither chosen nor a rival: the band's model-choice term is the same
    for fam, vf in fast.candidate_fits.items():
        assert full.candidate_fits[fam].label == vf.label
    assert set(full.candidate_fits) - set(fast.candidate_fits) <= set(fast.skipped)
    assert fast.curve.stats["model_choice_rivals"] == full.curve.stats["model_choice_rivals"]
    assert (fast.curve.model_choice_u_F is None) == (full.curve.model_choice_u_F is None)
    if full.curve.model_choice_u_F is not None:
        np.testing.assert_allclose(fast.curve.model_choice_u_F, full.curve.model_choice_u_F,
                                   rtol=1e-6)


def test_the_screening_is_exercised_by_these_sweeps(monkeypatch):
    # the comparison above means something only if some simpler variants are skipped
    calls = []
    real = fitting._decisively_worse
    monkeypatch.setattr(fitting, "_decisively_worse",
                        lambda *a, **k: calls.append(real(*a, **k)) or calls[-1])
    skipped_families = 0
    for V, C, sigma in SWEEPS:
        skipped_families += "landau" in fit_sweep(V, C, sigma, model="auto").skipped
    assert sum(calls) >= 2
    assert skipped_families >= 2  # the cross-family screen too
