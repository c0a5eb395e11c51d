"""Plain-text fit reports for people: ranking, parameters with uncertainties, correlations."""

from __future__ import annotations

import numpy as np


def format_ranking(rows, skipped, *, auto: bool, combined: bool = False) -> list[str]:
    """The model-choice table: rows as fits.fitting._choose gives them, chosen first."""
    if not auto:
        return []
    what = "both branches together; " if combined else ""
    lines = [f"Model choice ({what}leave-one-out prediction error; the simplest compact law "
             "within one standard error of the best is chosen):",
             f"  {'model':<11} {'k':>3} {'LOO score':>12} {'excess':>10} {'1 s.e.':>10}"]
    for i, r in enumerate(rows):
        mark = "   <- chosen" if i == 0 else ("   as good" if r["as_good"] else "")
        lines.append(f"  {r['name']:<11} {r['k']:>3} {r['loo']:12.4g} {r['d_loo']:10.3g} "
                     f"{r['se']:10.3g}{mark}")
    for name, reason in skipped.items():
        lines.append(f"  {name:<11} not fitted: {reason}")
    return lines


def verdict(stats) -> str:
    """One line on whether the fitted law describes the data (from Curve.stats)."""
    if stats.get("flat"):
        return ("flat within noise: C does not change with bias beyond the scatter "
                "(R^2 means nothing for a flat part)")
    if stats.get("describes_data", True):
        return "the model describes the data within their noise"
    parts = []
    if stats.get("chi2_p") is not None:
        parts.append(f"chi2 p = {stats['chi2_p']:.2g}")
    parts.append(f"{stats.get('runs')} runs of residual signs, {stats.get('runs_expected', 0):.1f} "
                 f"expected (p = {stats.get('runs_p', float('nan')):.2g})")
    return ("LACK OF FIT: the model does not describe the data (" + ", ".join(parts) +
            f"); the band includes a model-error term of {stats.get('model_error_F', 0.0):.3g} F")


def format_fit_report(branch, data, vf, curve, head: list[str], notes: list[str]) -> str:
    where = f"{branch} branch" if branch else "sweep"
    lo, hi = curve.valid_range_V
    lines = [f"{curve.model} fit, {where}: {data.n} points at {data.n_distinct} bias values "
             f"from {lo:g} V to {hi:g} V; weights: {data.weighting}"]
    lines += head
    lines.append(f"Variant: {vf.label}" + (" (chosen within the family by leave-one-out error)"
                                            if curve.model in ("poly", "landau", "genjohnson")
                                            else ""))
    if vf.joint:
        lines.append(f"Joint fit: {vf.joint}")
    if curve.model == "table":
        xs, cs = curve.spec.points(curve.params)
        u = curve.stderr
        lines.append("Points (mean at each bias, standard uncertainty of the mean):")
        for i, (x, c) in enumerate(zip(xs, cs)):
            lines.append(f"  {x:10.4g} V  {c:.6g} F +- {u[f'C{i}_F']:.2g} F")
        lines.append(f"Interpolated: max |residual| {curve.stats['max_resid_pct_C0']:.3g} % "
                     "of C0 (scatter of single points about the means)")
        lines.append(f"Valid bias range: {lo:g} V to {hi:g} V (the table's points; never "
                     "extrapolated)")
        lines += [f"Note: {note}" for note in notes]
        return "\n".join(lines)
    if data.sigma_F is None and np.isfinite(vf.chi2_red):
        lines.append("Parameters (standard uncertainty from the residual scatter, "
                     f"s = {np.sqrt(vf.chi2_red):.3g} F):")
    else:
        lines.append("Parameters (standard uncertainty; covariance scaled by "
                     f"max(1, chi2_red) = {vf.covar_scale:.4g}):")
    u = curve.stderr
    free = set(vf.free_names)
    width = max(len(n) for n in curve.param_names)
    for n in curve.param_names:
        v = curve.params[n]
        if n in vf.held:
            lines.append(f"  {n:<{width}} = {v:.6g}  (held at its bound)")
        elif n in free and u[n] > 0:
            rel = f" ({100 * u[n] / abs(v):.2g} %)" if v != 0 else ""
            lines.append(f"  {n:<{width}} = {v:.6g} +- {u[n]:.2g}{rel}")
        elif n in free:
            lines.append(f"  {n:<{width}} = {v:.6g} +- {u[n]:.2g}")
        else:
            lines.append(f"  {n:<{width}} = {v:.6g}  (fixed)")
    corr = curve.correlation
    names = [n for n in curve.param_names if u[n] > 0]
    if len(names) > 1:
        lines.append("Correlations:")
        idx = [curve.param_names.index(n) for n in names]
        for a in range(len(idx)):
            cells = " ".join(f"{corr[idx[a], idx[b]]:+.3f}" for b in range(a + 1))
            lines.append(f"  {names[a]:<{width}} {cells}")
    s = curve.stats
    lines.append(
        f"Fit: R^2 = {s['r2']:.6f}, RMS residual {s['rms_pct_C0']:.3g} % of C0, "
        f"max |residual| {s['max_resid_pct_C0']:.3g} % of C0, "
        + (f"chi2_red = {vf.chi2_red:.4g}" if data.sigma_F is not None
           else f"residual s.d. {np.sqrt(vf.chi2_red):.3g} F")
        + f" (dof {vf.dof})")
    lines.append(f"Valid bias range: {lo:g} V to {hi:g} V (the measured range; "
                 "no extrapolation)")
    lines.append(f"Verdict: {verdict(s)}")
    if curve.model_choice_u_F is not None:
        prof = curve.model_choice_u_F
        at = lo + (hi - lo) * int(np.argmax(prof)) / (len(prof) - 1)
        lines.append(f"Band: includes a model-choice term, up to {max(prof):.3g} F near {at:.3g} V, "
                     "from the laws that predict the points as well and part from this one ("
                     + ", ".join(s.get("model_choice_rivals") or []) + ")")
    for note in notes:
        lines.append(f"Note: {note}")
    return "\n".join(lines)
