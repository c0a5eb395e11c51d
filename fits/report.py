"""Plain-text fit reports for people: ranking, parameters with uncertainties, correlations."""

from __future__ import annotations

import numpy as np


def format_ranking(ranking, skipped, *, auto: bool, combined: bool = False) -> list[str]:
    if not auto:
        return []
    what = "both branches together, " if combined else ""
    lines = [f"Model choice ({what}lowest BIC first; AIC/BIC in lmfit's convention):",
             f"  {'model':<8} {'AIC':>12} {'BIC':>12} {'dBIC':>9}"]
    best = ranking[0][2]
    for i, (name, aic, bic) in enumerate(ranking):
        mark = "   <- chosen" if i == 0 else ""
        lines.append(f"  {name:<8} {aic:12.2f} {bic:12.2f} {bic - best:9.2f}{mark}")
    for name, reason in skipped.items():
        lines.append(f"  {name:<8} not fitted: {reason}")
    return lines


def format_fit_report(branch, data, vf, curve, head: list[str], notes: list[str]) -> str:
    where = f"{branch} branch" if branch else "sweep"
    lo, hi = curve.valid_range_V
    lines = [f"{curve.model} fit, {where}: {data.n} points at {data.n_distinct} bias values "
             f"from {lo:g} V to {hi:g} V; weights: {data.weighting}"]
    lines += head
    lines.append(f"Variant: {vf.label}" + (" (chosen within the family by BIC)"
                                            if curve.model in ("poly", "landau") else ""))
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
    for note in notes:
        lines.append(f"Note: {note}")
    return "\n".join(lines)
