"""The verification report: one self-contained HTML file (plots inline as base64 PNG) and a
JSON document of the same content, written atomically and only after everything was decided.
"""

from __future__ import annotations

import base64
import html
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


def _e(x) -> str:
    return html.escape(str(x))


def _f(x, scale=1.0, digits=5) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x * scale:.{digits}g}"


def _cond(x, unit="") -> str:
    return "not stated" if x is None else f"{x:g} {unit}".strip()


def render_html(v, doc: dict) -> str:
    claim = v.claim
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>benchkit verification: {_e(claim.part_id)}</title>",
        "<style>body{font-family:sans-serif;max-width:1000px;margin:1em auto;color:#222}"
        "table{border-collapse:collapse;margin:0.5em 0;font-size:0.85em}"
        "td,th{border:1px solid #bbb;padding:2px 6px;text-align:right}"
        "th{background:#eee}td.l,th.l{text-align:left}"
        ".conforming{color:#060}.nonconforming{color:#a00;font-weight:bold}"
        ".notdecidable{color:#a60;font-weight:bold}.flag{color:#a60}</style></head><body>",
        f"<h1>Verification of the claimed DC-bias curve of {_e(claim.part_id)}</h1>",
        f"<p class='{_cls(v.verdict)}' style='font-size:1.3em'>Lot verdict: "
        f"<b>{_e(v.verdict)}</b> ({v.lot.n_conforming} conforming, {v.lot.n_nonconforming} "
        f"nonconforming, {v.lot.n_not_decidable} not decidable of {v.lot.n_samples} samples)</p>",
        "<h2>Claim</h2><table>",
        _row("file", claim.path), _row("supplier", claim.supplier or "not stated"),
        _row("source", claim.source or "not stated"),
        _row("points", f"{claim.bias_V.size} ({claim.column}), {claim.valid_range_V[0]:g}.."
                       f"{claim.valid_range_V[1]:g} V; PCHIP between them, never extrapolated"),
        _row("tolerance used", v.tolerance.text()),
        _row("frequency", _cond(claim.freq_Hz, "Hz")),
        _row("AC level", _cond(claim.ac_level_Vrms, "Vrms")),
        _row("temperature", _cond(claim.temp_C, "degC")),
        _row("age since last heat", _cond(claim.age_h, "h")),
        "</table>",
        "<h2>Decision rule</h2>",
        f"<p>{_e(RULE_TEXT[v.rule])}. Expanded uncertainty U = k u<sub>c</sub>, k = {v.k:g} "
        f"(JCGM 100:2008). Lot: {_e(v.lot.rule)}. The rule is agreed with the customer "
        f"(ISO/IEC 17025:2017 7.1.3).</p>",
        "<p>Uncertainty per point: meter basic accuracy "
        f"{v.meter_accuracy_pct:g} % of reading (rectangular), the fit's u<sub>C</sub>(V), "
        "repeatability (largest of repeat scatter, reading scatter and scatter about the fit), "
        "and the aging correction when the age was normalised; combined in quadrature.</p>",
        "<h2>Plots</h2>",
        f"<img alt='claimed and measured curves' src='data:image/png;base64,{plot_curves(v)}'>",
        f"<img alt='deviations per bias' src='data:image/png;base64,{plot_deviations(v)}'>",
        "<h2>Samples</h2><table><tr><th class='l'>sample</th><th class='l'>from</th>"
        "<th class='l'>model</th><th>range (V)</th><th>freq (Hz)</th><th>AC (Vrms)</th>"
        "<th>temp (degC)</th><th>age (h)</th><th class='l'>verdict</th></tr>",
    ]
    for s in v.samples:
        c = s.sample.conditions
        a, b = s.sample.curve.valid_range_V
        parts.append(
            f"<tr><td class='l'>{_e(s.sample.sample_id)}</td><td class='l'>{_e(s.sample.origin)}</td>"
            f"<td class='l'>{_e(getattr(s.sample.curve, 'model', '?'))}</td><td>{a:g}..{b:g}</td>"
            f"<td>{_f(c.get('freq_Hz'))}</td><td>{_f(c.get('ac_level_Vrms'), digits=3)}</td>"
            f"<td>{_f(c.get('temp_C'), digits=3)}</td><td>{_f(c.get('age_h'))}</td>"
            f"<td class='l {_cls(s.verdict)}'>{_e(s.verdict)}</td></tr>")
    parts.append("</table>")
    if v.skipped:
        parts.append("<p>Skipped (not the claimed part):</p><ul>")
        parts += [f"<li>{_e(k.sample_id)} ({_e(k.part_id)}) from {_e(k.origin)}: {_e(k.reason)}</li>"
                  for k in v.skipped]
        parts.append("</ul>")
    for s in v.samples:
        parts.append(f"<h3>{_e(s.sample.sample_id)}: <span class='{_cls(s.verdict)}'>"
                     f"{_e(s.verdict)}</span></h3>")
        if s.flags:
            parts.append("<ul>" + "".join(f"<li class='flag'>{_e(f)}</li>" for f in s.flags) + "</ul>")
        parts.append("<table><tr><th>bias (V)</th><th>claimed (uF)</th><th>lower TL</th>"
                     "<th>upper TL</th><th>measured (uF)</th><th>dev (%)</th><th>u_meter (uF)</th>"
                     "<th>u_fit (uF)</th><th>u_rep (uF)</th><th>u_age (uF)</th><th>U (uF)</th><th>lower AL</th>"
                     "<th>upper AL</th><th class='l'>statement (ILAC-G8)</th>"
                     "<th class='l'>verdict</th></tr>")
        for p in s.points:
            d = p.decision
            comps = {c.name: c.u for c in (p.budget.components if p.budget else [])}
            dev = None if p.measured_F is None else (p.measured_F / p.claimed_F - 1) * 100
            parts.append(
                f"<tr><td>{p.bias_V:g}</td><td>{_f(p.claimed_F, 1e6)}</td><td>{_f(d.tol_lo, 1e6)}</td>"
                f"<td>{_f(d.tol_hi, 1e6)}</td><td>{_f(p.measured_F, 1e6)}</td><td>{_f(dev, digits=3)}</td>"
                f"<td>{_f(comps.get('meter accuracy'), 1e6, 2)}</td><td>{_f(comps.get('fit u_C(V)'), 1e6, 2)}</td>"
                f"<td>{_f(comps.get('repeatability'), 1e6, 2)}</td><td>{_f(comps.get('aging correction'), 1e6, 2)}</td>"
                f"<td>{_f(p.budget.U if p.budget else None, 1e6, 3)}</td><td>{_f(d.accept_lo, 1e6)}</td>"
                f"<td>{_f(d.accept_hi, 1e6)}</td><td class='l'>{_e(d.statement)}</td>"
                f"<td class='l {_cls(d.verdict)}'>{_e(d.verdict)}{(' - ' + _e(p.note)) if p.measured_F is None else ''}</td></tr>")
        parts.append("</table>")
    summ = doc.get("lot_summary")
    if summ:
        parts.append("<h2>Lot statistics at the claimed biases</h2><table><tr><th>bias (V)</th>"
                     "<th>n</th><th>mean (uF)</th><th>s (uF)</th><th>min (uF)</th><th>max (uF)</th></tr>")
        for i, b in enumerate(summ["bias_V"]):
            parts.append(f"<tr><td>{b:g}</td><td>{summ['n_per_bias'][i]}</td>"
                         f"<td>{_f(summ['mean_C_F'][i], 1e6)}</td><td>{_f(summ['std_C_F'][i], 1e6, 3)}</td>"
                         f"<td>{_f(summ['min_C_F'][i], 1e6)}</td><td>{_f(summ['max_C_F'][i], 1e6)}</td></tr>")
        parts.append("</table>")
        if summ.get("worst_sample_id"):
            parts.append(f"<p>Worst sample: {_e(summ['worst_sample_id'])}, "
                         f"{_f(summ['worst_score'] * 100, digits=3)} % of the way from the claim "
                         f"to its tolerance limit at its worst point.</p>")
    for n in v.notes:
        parts.append(f"<p class='flag'>{_e(n)}</p>")
    parts.append(f"<h2>Caution</h2><p>{_e(CAUTION)}</p></body></html>")
    return "\n".join(parts)


def _row(k, val) -> str:
    return f"<tr><th class='l'>{_e(k)}</th><td class='l'>{_e(val)}</td></tr>"


def _cls(verdict: str) -> str:
    return verdict.replace(" ", "")


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
