"""PNG plots drawn on the server: Matplotlib's object API with the Agg canvas chosen explicitly.

Neither the state-machine interface nor a backend switch: a Figure with a FigureCanvasAgg is
thread-safe per figure
and leaves the process's backend alone (the web server draws from several threads).
"""

from __future__ import annotations

import io

import numpy as np

from benchkit.library.records import CurveRecord, PartRecord

WIDTH_IN, HEIGHT_IN, DPI = 7.5, 4.4, 100


def _figure():
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(WIDTH_IN, HEIGHT_IN), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def _band(curve, V):
    """C +- 2u where the curve's covariance gives one (None otherwise)."""
    try:
        u = np.asarray(curve.u_C(V), dtype=float)
    except Exception:  # noqa: BLE001 - a curve without covariance has no band; the curve is drawn
        return None
    return u if np.all(np.isfinite(u)) else None


def part_png(part: PartRecord, records: list[CurveRecord], retired: set[int] = frozenset()) -> bytes:
    """Every current curve of a part over its valid range, with its +-2u band; claims dashed."""
    fig = _figure()
    ax = fig.add_subplot(1, 1, 1)
    for rec in records:
        if rec.curve_id in retired:
            continue
        curve = rec.curve
        lo, hi = rec.valid_range_V
        V = np.linspace(lo, hi, 200)
        C = np.asarray(curve.C(V), dtype=float)
        style = "--" if rec.origin == "supplier claim" else "-"
        (line,) = ax.plot(V, C * 1e6, style, lw=1.4,
                          label=f"#{rec.curve_id} {rec.origin}, {rec.sample_id or '-'} {rec.branch or ''}, "
                                f"{rec.temp_C:.1f} degC")
        u = _band(curve, V)
        if u is not None:
            ax.fill_between(V, (C - 2 * u) * 1e6, (C + 2 * u) * 1e6, color=line.get_color(), alpha=0.15, lw=0)
    if part.nominal_C_F:
        ax.axhline(part.nominal_C_F * 1e6, color="0.5", lw=0.8, ls=":", label="nominal")
    ax.set_xlabel("DC bias (V)")
    ax.set_ylabel("C (uF)")
    ax.set_title(f"{part.part_id}: curves with +-2u bands"[:90], fontsize=10)
    ax.grid(True, alpha=0.3)
    if records:
        ax.legend(fontsize=7, loc="best")
    fig.tight_layout()
    return _png(fig)


def compare_png(items: list[tuple[PartRecord, list[CurveRecord]]], unit: str, temp_C: float,
                temp_tol_C: float = 2.0) -> bytes:
    """Several parts overlaid against bias: C in farads (unit 'F') or as % of nominal ('pct').

    Each part shows the mean of its current curves at temp_C (within temp_tol_C), over the bias
    range every one of them covers: the same pooling as the ranking, never extrapolated.
    """
    fig = _figure()
    ax = fig.add_subplot(1, 1, 1)
    for part, records in items:
        recs = [r for r in records if abs(r.temp_C - temp_C) <= temp_tol_C]
        if not recs:
            continue
        lo = max(r.valid_range_V[0] for r in recs)
        hi = min(r.valid_range_V[1] for r in recs)
        if hi <= lo:
            continue
        V = np.linspace(lo, hi, 200)
        C = np.mean([np.asarray(r.curve.C(V), dtype=float) for r in recs], axis=0)
        if unit == "pct":
            if not part.nominal_C_F:
                continue
            ax.plot(V, 100.0 * C / part.nominal_C_F, lw=1.6, label=part.part_id)
        else:
            ax.plot(V, C, lw=1.6, label=part.part_id)
    ax.set_xlabel("DC bias (V)")
    if unit == "pct":
        ax.set_ylabel("C (% of nominal)")
        ax.axhline(100.0, color="0.5", lw=0.8, ls=":")
    else:
        ax.set_ylabel("C (F)")
    ax.set_title(f"effective capacitance at {temp_C:g} degC", fontsize=10)
    ax.grid(True, alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=8, loc="best")
    fig.tight_layout()
    return _png(fig)
