"""Plots by file suffix (PNG/PDF signatures), and the layering rule: fits/ imports neither
instruments/ nor benchkit/ (DEVELOPERS.md)."""

from __future__ import annotations

import ast
from pathlib import Path

import numpy as np
import pytest

import fits
from fits import fit_branches, fit_sweep, models
from fits.plots import PlotError, figure_bytes, new_figure


@pytest.fixture(scope="module")
def branches():
    spec = models.get("tanh")
    up = np.linspace(-4, 4, 17)
    dn = up[::-1]
    C = np.r_[spec.C(up, 1e-6, 8e-6, 1.5, 0.4), spec.C(dn, 1e-6, 8e-6, 1.5, -0.4)]
    rng = np.random.default_rng(1)
    sigma = 0.003 * C
    return fit_branches(np.r_[up, dn], C + rng.normal(size=C.size) * sigma,
                        ["rising"] * 17 + ["falling"] * 17, sigma, model="tanh")


def test_png_and_pdf_by_suffix(branches, tmp_path):
    # file signatures: PNG (ISO/IEC 15948) 89 50 4E 47 0D 0A 1A 0A; PDF (ISO 32000) "%PDF-"
    branches.plot(tmp_path / "both.png")
    branches.outcomes["rising"].plot(tmp_path / "rising.pdf")
    assert (tmp_path / "both.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (tmp_path / "rising.pdf").read_bytes()[:5] == b"%PDF-"
    with pytest.raises(PlotError, match=".png or .pdf"):
        branches.plot(tmp_path / "x.svg")
    assert not (tmp_path / "x.svg").exists()


def test_figure_has_fit_band_and_residual_panels(branches):
    fig = branches.plot()
    top, bottom = fig.axes
    labels = [t.get_text() for t in top.get_legend().get_texts()]
    assert any("rising" in s for s in labels) and any("falling" in s for s in labels)
    assert any("band" in s for s in labels)
    assert "residual" in bottom.get_ylabel()
    assert len(figure_bytes(fig, ".png")) > 1000


def test_curve_plot_on_given_axes():
    curve = fit_sweep(np.linspace(0, 5, 12), 1e-6 * (10 - np.linspace(0, 5, 12)),
                      model="poly").curve
    _, (ax,) = new_figure()
    assert curve.plot(ax=ax) is ax and len(ax.lines) == 1


def test_fits_imports_neither_instruments_nor_benchkit():
    root = Path(fits.__file__).resolve().parent
    for path in root.rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                names = [node.module]
            for n in names:
                assert n.split(".")[0] not in ("instruments", "benchkit"), (path, n)
