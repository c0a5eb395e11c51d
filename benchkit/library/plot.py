"""A PNG of every curve of one part: C against bias over each curve's valid range (a bare Figure on an Agg canvas)."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

from benchkit.atomic import write_bytes_atomic
from benchkit.library.records import CurveRecord, PartRecord


def plot_part(part: PartRecord, records: list[CurveRecord], path: str | Path) -> Path:
    """Draw the curves (solid, with a +-2u band where the covariance gives one) and save atomically."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.5, 4.8), dpi=110)
    FigureCanvasAgg(fig)  # draws to memory; no backend is chosen or switched here
    ax = fig.add_subplot(1, 1, 1)
    for rec in records:
        curve = rec.curve
        lo, hi = rec.valid_range_V
        V = np.linspace(lo, hi, 200)
        C = np.asarray(curve.C(V), dtype=float)
        label = (f"#{rec.curve_id} {rec.origin}, {rec.sample_id or '-'} {rec.branch or ''}, "
                 f"{rec.temp_C:g} degC, {rec.model}")
        (line,) = ax.plot(V, C * 1e6, label=label)
        try:
            u = np.asarray(curve.u_C(V), dtype=float)
            if np.all(np.isfinite(u)):
                ax.fill_between(V, (C - 2 * u) * 1e6, (C + 2 * u) * 1e6, color=line.get_color(), alpha=0.15)
        except Exception:  # noqa: BLE001 - a band is a nicety; the curve itself is drawn
            pass
    if part.nominal_C_F:
        ax.axhline(part.nominal_C_F * 1e6, color="grey", lw=0.8, ls="--", label="nominal")
    ax.set_xlabel("DC bias (V)")
    ax.set_ylabel("capacitance (uF)")
    ax.set_title(f"{part.part_id}: {part.description}"[:90])
    ax.grid(True, alpha=0.3)
    if records:
        ax.legend(fontsize=7, loc="best")
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return write_bytes_atomic(path, buf.getvalue())
