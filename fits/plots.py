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
# Overlaid branches differ in line style and marker too, not by colour alone (print, colour blindness).
_STYLES = {"rising": ("-", "o"), "falling": ("--", "s"), None: ("-", "o")}
_UNITS = ((1e-3, "mF"), (1e-6, "\u00b5F"), (1e-9, "nF"), (1e-12, "pF"))


class PlotError(FitsError):
    """A plot was asked for in a format this module does not write."""


def _unit(C_max: float) -> tuple[float, str]:
    for scale, name in _UNITS:
        if C_max >= scale:
            return scale, name
    return _UNITS[-1]


def conditions_text(conditions) -> str:
    """'1 kHz, 1 Vrms, 25 °C' from a curve's conditions (what was measured at), or ''."""
    c = dict(conditions or {})
    out = []
    f = c.get("freq_Hz")
    if isinstance(f, (int, float)):
        out.append(f"{f / 1e3:g} kHz" if f >= 1e3 else f"{f:g} Hz")
    a = c.get("ac_level_Vrms")
    if isinstance(a, (int, float)):
        out.append(f"{a:g} Vrms")
    t = c.get("temp_C")
    if isinstance(t, (int, float)):
        out.append(f"{t:.1f} \u00b0C")
    return ", ".join(out)


def _plain_ticks(*axes) -> None:
    """No '+1e1' offset or 1e-6 multiplier above an axis: the numbers are what they say."""
    for ax in axes:
        ax.ticklabel_format(axis="both", style="plain", useOffset=False)


def new_figure(n_axes: int = 1, **kw) -> tuple[Figure, list]:
    kw.setdefault("layout", "constrained")  # labels and titles inside the picture, not clipped
    fig = Figure(**kw)
    FigureCanvasAgg(fig)
    if n_axes == 1:
        return fig, [fig.add_subplot(1, 1, 1)]
    grid = fig.add_gridspec(2, 1, height_ratios=[3, 1], hspace=0.08)
    top = fig.add_subplot(grid[0])
    bottom = fig.add_subplot(grid[1], sharex=top)
    return fig, [top, bottom]


def plot_curve(curve, ax=None, band_k: float = 2.0, scale: float | None = None, n: int = 400,
               label: str | None = None, band_label: bool = True, **line_kws):
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
        _plain_ticks(ax)
    colour = line_kws.pop("color", _COLOURS.get(curve.branch, "tab:blue"))
    line_kws.setdefault("linestyle", _STYLES.get(curve.branch, _STYLES[None])[0])
    name = label or f"{curve.model} fit" + (f", {curve.branch}" if curve.branch else "")
    ax.plot(V, C / scale, color=colour, label=name, **line_kws)
    u = curve.u_C(V)
    if np.any(u > 0):
        ax.fill_between(V, (C - band_k * u) / scale, (C + band_k * u) / scale, color=colour,
                        alpha=0.25, linewidth=0,
                        label=f"{name}: \u00b1{band_k:g} u(C) band" if band_label else None)
    return ax


def plot_fits(outcomes, path=None, title: str | None = None, *, nominal_C_F: float | None = None,
              rated_V: float | None = None) -> Figure:
    """One figure for one or both branches.

    Top: data, fits and their bands, with the nominal value and the rated voltage marked, and
    on the right axis the same curve as change in % of nominal (what designers compare; % of
    C0 when no nominal is given). Bottom: residuals in % of C0 with the +-2u band of each fit
    drawn around zero, where it is visible (on the top panel it is thinner than the line).
    The title names the part, sample, model and the conditions (frequency, AC level, temperature).
    """
    fig, (top, bottom) = new_figure(2, figsize=(7.4, 5.8), dpi=110)
    C_max = max(float(np.max(o.data.C_F)) for o in outcomes)
    if nominal_C_F:
        C_max = max(C_max, float(nominal_C_F))
    scale, unit = _unit(C_max)
    first = outcomes[0].curve
    ref_pct = float(nominal_C_F) if nominal_C_F else abs(float(first.C(first.valid_range_V[0])))
    for o in outcomes:
        curve, data = o.curve, o.data
        colour = _COLOURS.get(curve.branch, "tab:blue")
        ls, marker = _STYLES.get(curve.branch, _STYLES[None])
        tag = curve.branch or "data"
        yerr = None if data.sigma_F is None else data.sigma_F / scale
        top.errorbar(data.bias_V, data.C_F / scale, yerr=yerr, fmt=marker, ms=3.5, color=colour,
                     mfc="none" if curve.branch == "falling" else colour, alpha=0.85,
                     label=f"measured, {tag}" if curve.branch else "measured")
        plot_curve(curve, ax=top, scale=scale, color=colour, linestyle=ls)
        ref = abs(float(curve.C(data.bias_V[np.argmin(np.abs(data.bias_V))])))
        resid = 100.0 * (data.C_F - curve.C(data.bias_V)) / ref
        rerr = None if data.sigma_F is None else 100.0 * data.sigma_F / ref
        lo, hi = curve.valid_range_V
        V = np.linspace(lo, hi, 300)
        band = 200.0 * np.asarray(curve.u_C(V), dtype=float) / ref
        if np.any(band > 0):
            bottom.fill_between(V, -band, band, color=colour, alpha=0.2, linewidth=0,
                                label=f"\u00b12u(C) of the {tag} fit")
        bottom.errorbar(data.bias_V, resid, yerr=rerr, fmt=marker, ms=3.0, color=colour,
                        mfc="none" if curve.branch == "falling" else colour)
    bottom.axhline(0.0, color="0.4", linewidth=0.8)
    if nominal_C_F:
        top.axhline(float(nominal_C_F) / scale, color="0.35", lw=0.9, ls=":",
                    label=f"nominal {nominal_C_F / scale:g} {unit}")
    if rated_V:
        for ax in (top, bottom):
            ax.axvline(float(rated_V), color="0.35", lw=0.9, ls="-.",
                       label=f"rated {float(rated_V):g} V" if ax is top else None)
    pct = top.secondary_yaxis(
        "right", functions=(lambda c: 100.0 * (c * scale / ref_pct - 1.0),
                            lambda d: (1.0 + d / 100.0) * ref_pct / scale))
    pct.set_ylabel("\u0394C (% of nominal)" if nominal_C_F else "\u0394C (% of C0)")
    top.set_ylabel(f"C ({unit})")
    bottom.set_ylabel("residual (% of C0)")
    bottom.set_xlabel("DC bias (V)")
    top.tick_params(labelbottom=False)
    _plain_ticks(top, bottom)
    top.grid(True, alpha=0.3)
    bottom.grid(True, alpha=0.3)
    top.legend(fontsize=7, loc="lower left")
    if bottom.get_legend_handles_labels()[0]:
        bottom.legend(fontsize=7, loc="upper right")
    who = " ".join(str(x) for x in (first.part_id, first.sample_id) if x)
    cond = conditions_text(first.conditions)
    top.set_title(title or (f"C(V) {first.model} fit {who}".strip() + (f" \u2014 {cond}" if cond else "")),
                  fontsize=10)
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
