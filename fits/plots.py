"""Plots of fitted curves: data with error bars, fit, uncertainty band, residuals panel.

Rendered with matplotlib's Agg canvas on a bare Figure (no pyplot, so no global backend
state and no display is ever needed). The file format follows the suffix: .png or .pdf.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from fits._atomic import write_bytes_atomic
from fits.errors import FitsError

FORMATS = {".png": "png", ".pdf": "pdf"}
_COLOURS = {"rising": "tab:blue", "falling": "tab:red", None: "tab:blue"}
_UNITS = ((1e-3, "mF"), (1e-6, "\u00b5F"), (1e-9, "nF"), (1e-12, "pF"))


class PlotError(FitsError):
    """A plot was asked for in a format this module does not write."""


def _unit(C_max: float) -> tuple[float, str]:
    for scale, name in _UNITS:
        if C_max >= scale:
            return scale, name
    return _UNITS[-1]


def new_figure(n_axes: int = 1, **kw) -> tuple[Figure, list]:
    fig = Figure(**kw)
    FigureCanvasAgg(fig)
    if n_axes == 1:
        return fig, [fig.add_subplot(1, 1, 1)]
    grid = fig.add_gridspec(2, 1, height_ratios=[3, 1], hspace=0.08)
    top = fig.add_subplot(grid[0])
    bottom = fig.add_subplot(grid[1], sharex=top)
    return fig, [top, bottom]


def plot_curve(curve, ax=None, band_k: float = 2.0, scale: float | None = None, n: int = 400,
               label: str | None = None, **line_kws):
    """C(V) over the curve's valid range with a band of +-band_k*u_C on ax (new if None)."""
    if ax is None:
        _, (ax,) = new_figure()
    lo, hi = curve.valid_range_V
    V = np.linspace(lo, hi, n)
    C = curve.C(V)
    if scale is None:
        scale, unit = _unit(float(np.max(C)))
        ax.set_ylabel(f"C ({unit})")
        ax.set_xlabel("DC bias (V)")
    colour = line_kws.pop("color", _COLOURS.get(curve.branch, "tab:blue"))
    name = label or f"{curve.model} fit" + (f", {curve.branch}" if curve.branch else "")
    ax.plot(V, C / scale, color=colour, label=name, **line_kws)
    u = curve.u_C(V)
    if np.any(u > 0):
        ax.fill_between(V, (C - band_k * u) / scale, (C + band_k * u) / scale, color=colour,
                        alpha=0.25, linewidth=0, label=f"{name}: \u00b1{band_k:g} u(C) band")
    return ax


def plot_fits(outcomes, path=None, title: str | None = None) -> Figure:
    """One figure for one or both branches: data, fits, bands; residuals in % of C0 below."""
    fig, (top, bottom) = new_figure(2, figsize=(7.0, 5.5), dpi=110)
    C_max = max(float(np.max(o.data.C_F)) for o in outcomes)
    scale, unit = _unit(C_max)
    for o in outcomes:
        curve, data = o.curve, o.data
        colour = _COLOURS.get(curve.branch, "tab:blue")
        tag = curve.branch or "data"
        yerr = None if data.sigma_F is None else data.sigma_F / scale
        top.errorbar(data.bias_V, data.C_F / scale, yerr=yerr, fmt="o", ms=3.5, color=colour,
                     alpha=0.8, label=f"measured, {tag}" if curve.branch else "measured")
        plot_curve(curve, ax=top, scale=scale, color=colour)
        ref = abs(float(curve.C(data.bias_V[np.argmin(np.abs(data.bias_V))])))
        resid = 100.0 * (data.C_F - curve.C(data.bias_V)) / ref
        rerr = None if data.sigma_F is None else 100.0 * data.sigma_F / ref
        bottom.errorbar(data.bias_V, resid, yerr=rerr, fmt="o", ms=3.0, color=colour)
    bottom.axhline(0.0, color="0.4", linewidth=0.8)
    top.set_ylabel(f"C ({unit})")
    bottom.set_ylabel("residual (% of C0)")
    bottom.set_xlabel("DC bias (V)")
    top.tick_params(labelbottom=False)
    top.grid(True, alpha=0.3)
    bottom.grid(True, alpha=0.3)
    top.legend(fontsize=7, loc="best")
    first = outcomes[0].curve
    who = " ".join(str(x) for x in (first.part_id, first.sample_id) if x)
    top.set_title(title or f"C(V) {first.model} fit {who}".strip(), fontsize=10)
    if path is not None:
        save_figure(fig, path)
    return fig


def figure_bytes(fig: Figure, suffix: str) -> bytes:
    """The figure rendered as PNG or PDF bytes (suffix '.png' or '.pdf')."""
    fmt = FORMATS.get(suffix.lower())
    if fmt is None:
        raise PlotError(f"plot file suffix {suffix!r} is not supported; use .png or .pdf")
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt)
    return buf.getvalue()


def save_figure(fig: Figure, path) -> Path:
    """Render and write atomically; the format follows the suffix (.png or .pdf)."""
    p = Path(path)
    return write_bytes_atomic(p, figure_bytes(fig, p.suffix))
