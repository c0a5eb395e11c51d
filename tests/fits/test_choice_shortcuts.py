"""The shortcuts that make model="auto" fast must not change what it computes or chooses.

- The polynomial leave-one-out residuals come from one QR per nest of variants and the hat
  matrix; they must equal brute-force leave-one-out refits (numpy.linalg.lstsq without the
  point) [published: the leave-one-out identity e_i = r_i/(1 - h_ii) of linear least
  squares, standard regression texts].
- A simpler variant of a family is skipped when the freer fit shows it cannot be chosen
  (fits.fitting._decisively_worse); fitting every variant must give the same choice.
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


SWEEPS = _sweeps()


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
    monkeypatch.setattr(fitting, "_decisively_worse", lambda *a: False)
    full = fit_sweep(V, C, sigma, model="auto")
    assert fast.curve.model == full.curve.model
    assert fast.curve.stats["variant"] == full.curve.stats["variant"]
    for name in full.curve.param_names:
        assert fast.curve.params[name] == pytest.approx(full.curve.params[name], rel=1e-7,
                                                        abs=1e-15)
    # and every family's own choice of variant is the same
    for fam, vf in full.candidate_fits.items():
        assert fast.candidate_fits[fam].label == vf.label


def test_the_screening_is_exercised_by_these_sweeps(monkeypatch):
    # the comparison above means something only if some simpler variants are skipped
    calls = []
    real = fitting._decisively_worse
    monkeypatch.setattr(fitting, "_decisively_worse", lambda *a: calls.append(real(*a)) or calls[-1])
    for V, C, sigma in SWEEPS:
        fit_sweep(V, C, sigma, model="auto")
    assert sum(calls) >= 2
