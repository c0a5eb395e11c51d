"""A PNG of every curve of one part (a bare Figure on an Agg canvas; no backend is chosen here).

Top: C against bias over each curve's valid range, in one unit (µF, nF or pF), with the
nominal value and the rated voltage marked, a supplier claim's tolerance band, and on the
right axis the change in % of nominal. Bottom: each curve's ±2u(C) band in % of nominal,
where it can be seen (on the top panel it is thinner than the line). Overlaid curves differ
in line style as well as colour.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from benchkit.atomic import write_bytes_atomic
from benchkit.library.records import CurveRecord, PartRecord

_UNITS = ((1e-3, "mF"), (1e-6, "\u00b5F"), (1e-9, "nF"), (1e-12, "pF"))
_LINESTYLES = ("-", "--", "-.", ":")


def _unit(C_max: float) -> tuple[float, str]:
    for scale, name in _UNITS:
        if C_max >= scale:
            return scale, name
    return _UNITS[-1]


def _claim_band(part: PartRecord, curve, V):
    """The claimed curve's tolerance limits (the part's tolerance letter), or None."""
    if not part.tolerance:
        return None
    from benchkit.catalogue.codes import parse_tolerance
    from benchkit.errors import UserError

    try:
        tol = parse_tolerance(part.tolerance)
    except UserError:
        return None
    C = np.asarray(curve.C(V), dtype=float)
    lo, hi = zip(*(tol.limits(float(c)) for c in C))
    return np.asarray(lo), np.asarray(hi), tol.text()


def plot_part(part: PartRecord, records: list[CurveRecord], path: str | Path) -> Path:
    """Draw the curves, their bands and the part's markers, and save atomically."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.8, 6.0), dpi=110, layout="constrained")
    FigureCanvasAgg(fig)  # draws to memory; no backend is chosen or switched here
    grid = fig.add_gridspec(2, 1, height_ratios=[3, 1])
    ax = fig.add_subplot(grid[0])
    low = fig.add_subplot(grid[1], sharex=ax)
    curves = []
    for rec in records:
        lo, hi = rec.valid_range_V
        V = np.linspace(lo, hi, 200)
        curves.append((rec, V, np.asarray(rec.curve.C(V), dtype=float)))
    peak = max([float(np.max(C)) for _, _, C in curves] + [part.nominal_C_F or 0.0, 1e-12])
    scale, unit = _unit(peak)
    ref = part.nominal_C_F or (float(curves[0][2][0]) if curves else 1.0)
    for i, (rec, V, C) in enumerate(curves):
        curve = rec.curve
        ls = _LINESTYLES[i % len(_LINESTYLES)]
        cond = f"{rec.temp_C:.1f} \u00b0C" if rec.temp_C is not None else ""
        label = (f"#{rec.curve_id} {rec.origin}, {rec.sample_id or '-'} {rec.branch or ''}, "
                 f"{cond}, {rec.model}")
        (line,) = ax.plot(V, C / scale, ls=ls, lw=1.4, label=label)
        colour = line.get_color()
        if rec.origin == "supplier claim":
            band = _claim_band(part, curve, V)
            if band is not None:
                ax.fill_between(V, band[0] / scale, band[1] / scale, color=colour, alpha=0.12,
                                linewidth=0, label=f"#{rec.curve_id} claim band ({band[2]})")
        try:
            u = np.asarray(curve.u_C(V), dtype=float)
        except Exception:  # noqa: BLE001 - a curve without covariance has no band to draw
            u = None
        if u is not None and np.all(np.isfinite(u)) and np.any(u > 0):
            ax.fill_between(V, (C - 2 * u) / scale, (C + 2 * u) / scale, color=colour, alpha=0.2,
                            linewidth=0)
            low.fill_between(V, -200.0 * u / ref, 200.0 * u / ref, color=colour, alpha=0.25,
                             linewidth=0)
            low.plot(V, 200.0 * u / ref, ls=ls, color=colour, lw=0.8)
    if part.nominal_C_F:
        ax.axhline(part.nominal_C_F / scale, color="0.35", lw=0.9, ls=":",
                   label=f"nominal {part.nominal_C_F / scale:g} {unit}")
    if part.rated_V:
        for a in (ax, low):
            a.axvline(part.rated_V, color="0.35", lw=0.9, ls="-.",
                      label=f"rated {part.rated_V:g} V" if a is ax else None)
    pct = ax.secondary_yaxis("right", functions=(lambda c: 100.0 * (c * scale / ref - 1.0),
                                                 lambda d: (1.0 + d / 100.0) * ref / scale))
    pct.set_ylabel("\u0394C (% of nominal)" if part.nominal_C_F else "\u0394C (% of the first curve at its low end)")
    ax.set_ylabel(f"capacitance ({unit})")
    low.set_ylabel("\u00b12u(C) (% of nominal)")
    low.set_xlabel("DC bias (V)")
    ax.tick_params(labelbottom=False)
    for a in (ax, low):
        a.ticklabel_format(axis="both", style="plain", useOffset=False)
        a.grid(True, alpha=0.3)
    ax.set_title(f"{part.part_id}: {part.description}"[:90], fontsize=10)
    if records:
        ax.legend(fontsize=7, loc="lower left")
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return write_bytes_atomic(path, buf.getvalue())
