"""The verification report: one self-contained HTML file (plots inline as base64 PNG) and a
JSON document of the same content, written atomically and only after everything was decided.

The HTML comes from the Jinja2 template benchkit/web/templates/report.html, in the environment
the library's web pages use (benchkit.web.templating); the plots are drawn with Matplotlib's
object API on an Agg canvas chosen explicitly (no pyplot, no global backend switch).
"""

from __future__ import annotations

import base64
import io
import json
import math
from pathlib import Path

import numpy as np

from benchkit.atomic import write_text_atomic
from benchkit.verify.decision import RULE_TEXT

CAUTION = ("This report judges the samples measured against the claim under the stated rule; "
           "it does not replace the part's data sheet, the agreement with the supplier, or a "
           "review by a qualified person. Check the conditions flagged before acting on it.")


def _figure(figsize):
    """A bare Figure on an Agg canvas: no pyplot, so the caller's backend is left alone."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, layout="constrained")  # labels inside the picture
    FigureCanvasAgg(fig)
    return fig, fig.add_subplot(1, 1, 1)


def _colours() -> list[str]:
    import matplotlib

    return matplotlib.rcParams["axes.prop_cycle"].by_key()["color"]


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def plot_curves(v) -> str:
    """The claim with its band, every measured curve, the decided points with their U."""
    fig, ax = _figure((7.5, 4.6))
    claim = v.claim
    lo_V, hi_V = claim.valid_range_V
    grid = np.linspace(lo_V, hi_V, 300)
    c = claim.C(grid)
    lo, hi = claim.limits(grid, v.tolerance)
    ax.fill_between(grid, lo * 1e6, hi * 1e6, color="0.85", label=f"claim band ({v.tolerance.text()})")
    ax.plot(grid, c * 1e6, "k-", lw=1.8, label="claim (PCHIP)")
    ax.plot(claim.bias_V, claim.C_F * 1e6, "ks", ms=4)
    colours = _colours()
    for i, s in enumerate(v.samples):
        col = colours[i % len(colours)]
        a, b = s.sample.curve.valid_range_V
        g = np.linspace(a, b, 200)
        ax.plot(g, np.asarray(s.sample.curve.C(g), dtype=float) * 1e6, "-", color=col, lw=1,
                label=f"{s.sample.sample_id} ({s.verdict})")
        xs = [p.bias_V for p in s.points if p.measured_F is not None]
        ys = [p.measured_F * 1e6 for p in s.points if p.measured_F is not None]
        es = [p.budget.U * 1e6 for p in s.points if p.measured_F is not None]
        ax.errorbar(xs, ys, yerr=es, fmt="o", ms=3, color=col, capsize=2)
    ax.set_xlabel("DC bias (V)")
    ax.set_ylabel("capacitance (\u00b5F)")
    cond = ", ".join(x for x in (f"{claim.freq_Hz:g} Hz" if claim.freq_Hz else "",
                                 f"{claim.ac_level_Vrms:g} Vrms" if claim.ac_level_Vrms else "",
                                 f"{claim.temp_C:g} \u00b0C" if claim.temp_C is not None else "") if x)
    ax.set_title(f"{claim.part_id}: claimed and measured C(V)" + (f" \u2014 claim at {cond}" if cond else ""),
                 fontsize=10)
    ax.ticklabel_format(axis="both", style="plain", useOffset=False)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))  # beside the data, not on it
    return _png(fig)


def plot_deviations(v) -> str:
    """Deviation from the claim per claimed bias, with U, the tolerance and acceptance limits."""
    fig, ax = _figure((7.5, 4.0))
    claim = v.claim
    bias = claim.bias_V
    c = np.atleast_1d(claim.C(bias))
    lo, hi = claim.limits(bias, v.tolerance)
    ax.plot(bias, (hi / c - 1) * 100, "k-", lw=1, label="tolerance limits")
    ax.plot(bias, (lo / c - 1) * 100, "k-", lw=1)
    width = 0.6 * (np.min(np.diff(bias)) if bias.size > 1 else 1.0)
    n = max(len(v.samples), 1)
    colours = _colours()
    for i, s in enumerate(v.samples):
        col = colours[i % len(colours)]
        off = (i - (n - 1) / 2) * width / n
        for p in s.points:
            if p.measured_F is None:
                continue
            d = (p.measured_F / p.claimed_F - 1) * 100
            e = p.budget.U / p.claimed_F * 100
            ax.errorbar(p.bias_V + off, d, yerr=e, fmt="o", ms=3, color=col, capsize=2)
            if v.rule == "guarded":
                ax.plot([p.bias_V + off] * 2,
                        [(p.decision.accept_lo / p.claimed_F - 1) * 100,
                         (p.decision.accept_hi / p.claimed_F - 1) * 100], "_", color="0.4", ms=6)
        ax.plot([], [], "o", color=col, label=s.sample.sample_id)
    ax.axhline(0, color="0.5", lw=0.8)
    ax.set_xlabel("DC bias (V)")
    ax.set_ylabel("measured - claimed (% of claim)")
    title = "deviation per claimed bias, error bars = U"
    if v.rule == "guarded":
        title += "; grey ticks = acceptance limits"
    ax.set_title(title, fontsize=10)
    ax.ticklabel_format(axis="both", style="plain", useOffset=False)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return _png(fig)


def _components(p) -> dict:
    """A point's uncertainty components by name (empty when the point has no budget)."""
    return {c.name: c.u for c in (p.budget.components if p.budget else [])}


def render_html(v, doc: dict) -> str:
    from benchkit.web.templating import render

    return render("report.html", v=v, doc=doc, rule_text=RULE_TEXT[v.rule], caution=CAUTION,
                  plots={"curves": plot_curves(v), "deviations": plot_deviations(v)},
                  components=_components)


def write_report(v, out_dir) -> tuple[Path, Path]:
    """Render both files first, then write each atomically (JSON last: it marks completion)."""
    doc = _json_safe(v.to_dict())
    doc["caution"] = CAUTION
    text_json = json.dumps(doc, indent=2, allow_nan=False, default=_json_default)
    text_html = render_html(v, doc)
    out = Path(out_dir)
    h = write_text_atomic(out / "report.html", text_html)
    j = write_text_atomic(out / "report.json", text_json + "\n")
    return h, j


def _json_safe(o):
    """NaN/inf become null (JSON has no NaN), numpy scalars plain numbers, recursively."""
    if isinstance(o, dict):
        return {k: _json_safe(x) for k, x in o.items()}
    if isinstance(o, (list, tuple)):
        return [_json_safe(x) for x in o]
    if isinstance(o, np.ndarray):
        return _json_safe(o.tolist())
    if isinstance(o, np.generic):
        o = o.item()
    if isinstance(o, float) and not math.isfinite(o):
        return None
    return o


def _json_default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")
