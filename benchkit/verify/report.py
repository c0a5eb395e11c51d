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
from benchkit.units import format_value
from benchkit.verify import identity, margins
from benchkit.verify.compare import AC_LEVEL_REL_TOL, AC_LEVEL_TOL_SOURCE
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


# Engineering notation on the page, through the project's one formatter (benchkit.units).
MICRO = "\u00b5"
DASH = "\u2013"


def cap(x, digits: int = 4) -> str:
    """A capacitance for the page: 404.5 nF, 27 µF; a dash when there is none."""
    if x is None or not math.isfinite(float(x)):
        return DASH
    return format_value(float(x), "F", digits=digits, micro=MICRO)


def pct(x, signed: bool = False, decimals: int = 2) -> str:
    """A ratio already in percent: 1.07 %, +1.07 %."""
    if x is None or not math.isfinite(float(x)):
        return DASH
    return f"{float(x):{'+' if signed else ''}.{decimals}f} %"


def volts(x, unit: str = "V") -> str:
    """A bias or level as the claim and plan write it: 12.5 V, 12.25 V, 1 Vrms (4 digits at most)."""
    if x is None or not math.isfinite(float(x)):
        return DASH
    return f"{float(x):.4g} {unit}"


def freq(x) -> str:
    if x is None or not math.isfinite(float(x)):
        return "not stated"
    return format_value(float(x), "Hz", micro=MICRO)


def _condition_text(claim) -> str:
    return ", ".join(x for x in (freq(claim.freq_Hz) if claim.freq_Hz else "",
                                 volts(claim.ac_level_Vrms, "Vrms") if claim.ac_level_Vrms else "",
                                 f"{claim.temp_C:g} \u00b0C" if claim.temp_C is not None else "") if x)


def curves_figure(v):
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
    ax.set_ylabel(f"capacitance ({MICRO}F)")
    cond = _condition_text(claim)
    ax.set_title(f"{claim.part_id}: claimed and measured C(V)" + (f" \u2014 claim at {cond}" if cond else ""),
                 fontsize=10)
    ax.ticklabel_format(axis="both", style="plain", useOffset=False)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))  # beside the data, not on it
    return fig


# An acceptance limit closer to its tolerance line than this share of the plot's height would
# sit on the line and read as one mark; it is then left out of the plot (the tables give it).
AL_DISTINCT_FRACTION = 0.02


def deviations_figure(v):
    """Deviation from the claim per claimed bias, with U, the tolerance limits and, where they
    can be told apart from those, the acceptance limits as inward-pointing triangles."""
    fig, ax = _figure((7.5, 4.0))
    claim = v.claim
    bias = claim.bias_V
    c = np.atleast_1d(claim.C(bias))
    lo, hi = claim.limits(bias, v.tolerance)
    tol_hi, tol_lo = (hi / c - 1) * 100, (lo / c - 1) * 100
    ax.plot(bias, tol_hi, "k-", lw=1, label="tolerance limits")
    ax.plot(bias, tol_lo, "k-", lw=1)
    width = 0.6 * (np.min(np.diff(bias)) if bias.size > 1 else 1.0)
    n = max(len(v.samples), 1)
    colours = _colours()
    decided = [(s, p) for s in v.samples for p in s.points if p.measured_F is not None]
    ys = [float(x) for x in np.concatenate([tol_hi, tol_lo])]
    for _, p in decided:
        d, e = (p.measured_F / p.claimed_F - 1) * 100, p.budget.U / p.claimed_F * 100
        ys += [d - e, d + e]
    span = (max(ys) - min(ys)) or 1.0
    al_drawn = al_hidden = 0
    for i, s in enumerate(v.samples):
        col = colours[i % len(colours)]
        off = (i - (n - 1) / 2) * width / n
        for p in s.points:
            if p.measured_F is None:
                continue
            d = (p.measured_F / p.claimed_F - 1) * 100
            e = p.budget.U / p.claimed_F * 100
            ax.errorbar(p.bias_V + off, d, yerr=e, fmt="o", ms=3, color=col, capsize=2)
            dec = p.decision
            for al, tl, marker in ((dec.accept_lo, dec.tol_lo, "^"), (dec.accept_hi, dec.tol_hi, "v")):
                gap = abs(al - tl) / p.claimed_F * 100
                if gap == 0.0:
                    continue  # simple acceptance, or U = 0: the acceptance limit is the line
                if gap < AL_DISTINCT_FRACTION * span:
                    al_hidden += 1
                    continue
                ax.plot(p.bias_V + off, (al / p.claimed_F - 1) * 100, marker, color="0.35", ms=5,
                        mfc="none", label="acceptance limits (TL moved in by U)" if not al_drawn else None)
                al_drawn += 1
        ax.plot([], [], "o", color=col, label=s.sample.sample_id)
    ax.axhline(0, color="0.5", lw=0.8)
    ax.set_xlabel("DC bias (V)")
    ax.set_ylabel("measured \u2212 claimed (% of claim)")
    title = "deviation per claimed bias, error bars = U"
    if al_hidden:
        title += (f"\n{al_hidden} acceptance limit(s) within {AL_DISTINCT_FRACTION * span:.2g} % of "
                  "the tolerance lines not drawn: see the tables")
    ax.set_title(title, fontsize=9)
    ax.ticklabel_format(axis="both", style="plain", useOffset=False)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))  # beside the data, not on it
    fig.al_drawn, fig.al_hidden = al_drawn, al_hidden  # what was drawn, for the page and tests
    return fig


def plot_curves(v) -> str:
    return _png(curves_figure(v))


def plot_deviations(v) -> str:
    return _png(deviations_figure(v))


def _components(p) -> dict:
    """A point's uncertainty components by name (empty when the point has no budget)."""
    return {c.name: c.u for c in (p.budget.components if p.budget else [])}


def render_html(v, doc: dict) -> str:
    from benchkit.web.templating import render

    worst = {s.sample.sample_id: margins.worst(s.points) for s in v.samples}
    ranked = [(sid, m) for sid, m in worst.items() if m is not None]
    lot_worst = min(ranked, key=lambda x: x[1].margin_pct) if ranked else None
    return render("report.html", v=v, doc=doc, rule_text=RULE_TEXT[v.rule], caution=CAUTION,
                  plots={"curves": plot_curves(v), "deviations": plot_deviations(v)},
                  components=_components, cap=cap, pct=pct, volts=volts, freq=freq,
                  worst=worst, lot_worst=lot_worst, micro=MICRO,
                  ac_tol_Vrms=AC_LEVEL_REL_TOL * float(v.claim.ac_level_Vrms),
                  ac_tol_source=AC_LEVEL_TOL_SOURCE)


def report_document(v, inputs=None, operator: str | None = None, now=None) -> dict:
    """The JSON document: the identity block first, then the verification and its margins."""
    results = _json_safe(v.to_dict())
    for s, entry in zip(v.samples, results["samples"]):
        m = margins.worst(s.points)
        entry["worst_margin"] = None if m is None else {**_json_safe(m.to_dict()), "text": m.text(MICRO)}
    results["caution"] = CAUTION
    ident = identity.finish(identity.gather(v, inputs, operator), results, now)
    return {"identity": ident, **results}


def write_report(v, out_dir, inputs=None, operator: str | None = None, now=None) -> tuple[Path, Path]:
    """Render both files first, then write each atomically (JSON last: it marks completion).
    `inputs` are the run directories and curve documents given (hashed into the identity)."""
    doc = report_document(v, inputs, operator, now)
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
