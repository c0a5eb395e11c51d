"""Bad fit input gives fits.FitError with one clear line (what, where, what to do)."""

from __future__ import annotations

import numpy as np
import pytest

from fits import FitError, fit_branches, fit_sweep

V = np.linspace(0, 5, 8)
C = 10e-6 / (1 + (V / 2) ** 2) ** (1 / 3)


@pytest.mark.parametrize("args, kwargs, expect", [
    ((V[:4], C[:4]), {"model": "tanh"}, "needs at least 5 points"),
    ((np.full(6, 2.0), np.full(6, 5e-6)), {}, "all 6 points are at one bias"),
    ((V, np.where(V == V[3], np.nan, C)), {}, r"C_F\[3\] is nan"),
    ((np.where(V == V[2], np.inf, V), C), {}, r"bias_V\[2\] is inf"),
    ((V, np.where(V == V[5], -1e-6, C)), {}, "is not positive"),
    ((V, np.where(V == V[0], 0.0, C)), {}, "is not positive"),
    ((V, C[:-1]), {}, "8 bias values but 7 capacitance values"),
    ((V, C, np.zeros(8)), {}, r"sigma_F\[0\] = 0.0 must be a positive number"),
    ((V, C), {"model": "nonesuch"}, "no model named 'nonesuch'"),
    (([], []), {}, "no points"),
    ((V, C), {"branch": "up"}, "branch must be"),
])
def test_bad_input_one_clear_line(args, kwargs, expect):
    with pytest.raises(FitError, match=expect) as info:
        fit_sweep(*args, **kwargs)
    assert "\n" not in str(info.value)


def test_auto_with_too_few_points_lists_each_model():
    with pytest.raises(FitError) as info:
        fit_sweep(V[:2], C[:2])
    msg = str(info.value)
    assert "tanh needs" in msg and "poly degree 1 needs" in msg and "landau needs" in msg
    assert "\n" not in msg


def test_branch_labels_checked():
    with pytest.raises(FitError, match="branch labels must be"):
        fit_branches(V, C, ["rising"] * 7 + ["sideways"])
    with pytest.raises(FitError, match="one per point"):
        fit_branches(V, C, ["rising"] * 3)


def test_branch_arrays_must_match():
    with pytest.raises(FitError, match="7 capacitance values for 8 bias values"):
        fit_branches(V, C[:-1], ["rising"] * 8)
    with pytest.raises(FitError, match="3 sigma values"):
        fit_branches(V, C, ["rising"] * 8, sigma_F=[1e-9] * 3)
