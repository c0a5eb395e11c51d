"""What a reader needs on a fit plot: the conditions in the title, the nominal and rated-voltage
markers, a band that can be seen, the change in % of nominal, one unit spelling, plain ticks."""

from __future__ import annotations

import numpy as np
import pytest

from fits import fit_branches, models
from fits.plots import plot_fits


@pytest.fixture(scope="module")
def c0g_like():
    """A nearly flat curve around 10 nF: the case that drew a '+1e1' offset above the axis."""
    spec = models.get("poly")
    V = np.linspace(0.0, 50.0, 11)
    C = 10.000e-9 * (1.0 - 1e-5 * (V / 50.0) ** 2)
    sigma = np.full_like(C, 1e-13)
    bias = np.r_[V, V[::-1][1:]]
    caps = np.r_[C, C[::-1][1:]] + np.random.default_rng(3).normal(size=2 * V.size - 1) * 1e-13
    out = fit_branches(bias, caps, ["rising"] * V.size + ["falling"] * (V.size - 1),
                       np.r_[sigma, sigma[1:]], model="poly",
                       conditions={"freq_Hz": 1e6, "ac_level_Vrms": 1.0, "temp_C": 25.0})
    assert spec is not None
    return out


def test_title_markers_and_second_view(c0g_like):
    fig = plot_fits(list(c0g_like.outcomes.values()), nominal_C_F=10e-9, rated_V=50.0)
    fig.canvas.draw()
    top, bottom = fig.axes[0], fig.axes[1]
    title = top.get_title()
    assert "1000 kHz" in title and "1 Vrms" in title and "25.0 \u00b0C" in title
    labels = top.get_legend_handles_labels()[1]
    assert "nominal 10 nF" in labels and "rated 50 V" in labels
    assert top.get_ylabel() == "C (nF)"
    # the second view: the right axis reads the change in % of nominal
    assert any("% of nominal" in a.get_ylabel() for a in top.child_axes)
    # the band is drawn on the residual panel, around zero, where it is not thinner than a line
    assert bottom.collections and any("2u(C)" in t for t in bottom.get_legend_handles_labels()[1])
    # no offset or multiplier text above any axis (matplotlib draws it as the offset text)
    for ax in (top, bottom):
        assert ax.yaxis.get_offset_text().get_text() == ""
        assert ax.xaxis.get_offset_text().get_text() == ""


def test_overlaid_branches_differ_in_line_style(c0g_like):
    fig = plot_fits(list(c0g_like.outcomes.values()))
    styles = {line.get_label(): line.get_linestyle() for line in fig.axes[0].get_lines()}
    assert styles["poly fit, rising"] != styles["poly fit, falling"]
