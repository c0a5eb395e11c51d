"""The fitting engine (fits.solver, the one every C(V) fit uses) against the NIST StRD
nonlinear regression datasets [published: NIST Statistical Reference Datasets, public
domain; certified values to 11 significant digits].

The data files in tests/fits/strd were transcribed from the published files; each is checked
here independently of the engine: the certified residual sum of squares must be reproduced at
the certified parameters (plain numpy) to 9 digits or better, which a wrong data value or a
wrong model line would break. The score is NIST's log relative error (matched digits); run
with `pytest -s` to see the table (also printed by `make bench`).
"""

from __future__ import annotations

import numpy as np
import pytest

from benchkit.benchmarks import strd

DATASETS = strd.datasets()
NAMES = [d["name"] for d in DATASETS]


def test_the_shipped_datasets():
    # 14 of the 27 StRD nonlinear datasets, those we could transcribe with certainty
    assert sorted(NAMES) == sorted(strd.MODELS)
    assert len(NAMES) == 14


@pytest.mark.parametrize("ds", DATASETS, ids=NAMES)
def test_transcription_reproduces_the_certified_sum_of_squares(ds):
    f, _ = strd.MODELS[ds["name"]]
    r = f(ds["certified"], ds["x"]) - ds["y"]
    rss = float(r @ r)
    assert -np.log10(abs(rss - ds["rss"]) / ds["rss"]) >= 9.0


@pytest.mark.parametrize("ds", DATASETS, ids=NAMES)
def test_analytic_jacobian_matches_central_differences(ds):
    f, J = strd.MODELS[ds["name"]]
    b, x = ds["certified"], ds["x"]
    num = np.empty((x.size, b.size))
    for j in range(b.size):
        h = 1e-6 * abs(b[j])
        up, dn = b.copy(), b.copy()
        up[j] += h
        dn[j] -= h
        num[:, j] = (f(up, x) - f(dn, x)) / (2 * h)
    np.testing.assert_allclose(J(b, x), num, rtol=1e-5, atol=1e-9 * np.max(np.abs(num)))


def test_engine_matches_six_digits_on_every_dataset_from_a_certified_start():
    rows = strd.run_all()
    print("\nNIST StRD, matched digits (LRE) of fits.solver, parameters / RSS:")
    for line in strd.format_rows(rows):
        print(line)
    for r in rows:
        assert r["best_lre_params"] >= strd.MIN_LRE, r
        best = max(r["runs"], key=lambda x: x["lre_params"])
        assert best["lre_rss"] >= strd.MIN_LRE, r
