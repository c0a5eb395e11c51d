"""A C(V, T) family as one SPICE subcircuit with the temperature as a parameter.

    .subckt NAME a b params: T_C=-1000
    C1 a n1 Q={w0(T)*Q0(V) + w1(T)*Q1(V) + ...}
    R1 n1 b ESR
    .ends NAME

The weights w_i(T) are the family's linear interpolation in temperature (fits/family.py):
hat functions of the measured temperatures, so at every T the charge is the same weighted sum
of the members' closed-form charges as the family's C is of their C(V), and dQ/dV is the
family's C(V, T) exactly (charge conserved at every temperature). T is the instance parameter
T_C in degC, e.g. `X1 a b NAME T_C=85`; left at its default (below absolute zero) the
subcircuit uses ngspice's circuit temperature `temper` (`.temp`, `.options temp`, or
`set temp` in a control block). SPICE cannot refuse a value: outside the measured
temperatures the weights hold the nearest end (stated in the comment block: do not rely on
it there), as outside the measured bias the expressions carry the models on.
"""

from __future__ import annotations

import math

from benchkit.errors import UserError
from benchkit.exports.spice import _comment, subckt_name
from benchkit.units import format_value

USE_CIRCUIT_TEMP = -1000.0


def _num(x: float) -> str:
    return repr(float(x))


def weight_expressions(temps_C, t: str) -> list[str]:
    """SPICE expressions of the hat-function weights at the (clamped) temperature t."""
    T = [float(x) for x in temps_C]
    n = len(T)
    if n == 1:
        return ["1"]
    out = []
    for i in range(n):
        parts = []
        if i > 0:
            parts.append(f"({t}-{_num(T[i - 1])})/{_num(T[i] - T[i - 1])}")
        if i < n - 1:
            parts.append(f"({_num(T[i + 1])}-{t})/{_num(T[i + 1] - T[i])}")
        rise_fall = parts[0] if len(parts) == 1 else f"min({parts[0]},{parts[1]})"
        out.append(f"max(0,min(1,{rise_fall}))")
    return out


def spice_family_subcircuit(family, *, name: str | None = None, esr_ohm: float | None = None,
                            source_note: str | None = None) -> str:
    """Netlist text of the subcircuit of a fits.family.CurveFamily (ends with a newline)."""
    from benchkit.library.fitsbridge import fits_errors

    name = subckt_name(name or family.part_id or "CAP")
    if esr_ohm is not None:
        esr_ohm = float(esr_ohm)
        if not (math.isfinite(esr_ohm) and esr_ohm > 0):
            raise UserError(f"--esr {esr_ohm!r}: must be a positive resistance in ohms (or leave it out)")
    v = "V(a,n1)" if esr_ohm is not None else "V(a,b)"
    t_lo, t_hi = family.temp_range_C
    t_sel = f"((T_C > -273.15) ? T_C : temper)"
    t = f"min(max({t_sel},{_num(t_lo)}),{_num(t_hi)})"
    weights = weight_expressions(family.temps_C, t)
    terms = []
    for w, curve in zip(weights, family.curves):
        try:
            q = curve.spice_charge(v)
        except (NotImplementedError,) + fits_errors() as exc:
            raise UserError(f"curve model {curve.model!r} at {curve.conditions.get('temp_C'):g} "
                            f"degC: no SPICE charge expression ({exc})") from None
        terms.append(f"{w}*({q})")
    lo = max(c.valid_range_V[0] for c in family.curves)
    hi = min(c.valid_range_V[1] for c in family.curves)
    cond = dict(family.curves[0].conditions or {})
    lines = [
        f"* {name}: DC-bias and temperature capacitor model written by benchkit "
        "(charge-conserving, Q={...})",
        f"* part {_comment(family.part_id)}  sample {_comment(family.sample_id)}  branch "
        f"{_comment(family.branch)}",
        f"* temperature: instance parameter T_C in degC (X1 a b {name} T_C=85); left out, the "
        "circuit temperature (TEMP) is used",
        "* measured temperatures: " + ", ".join(f"{float(x):g}" for x in family.temps_C)
        + " degC; linear in T between them; outside them the nearest end is held: do not rely on it",
        f"* valid bias range at every temperature: {lo:g} V to {hi:g} V measured",
        f"* conditions: {format_value(cond['freq_Hz'], 'Hz') if cond.get('freq_Hz') else '?'}, "
        f"{format_value(cond['ac_level_Vrms'], 'Vrms') if cond.get('ac_level_Vrms') else '?'}, "
        f"function {_comment(cond.get('function'))}",
    ]
    for curve in family.curves:
        lines.append(f"*   {float(curve.conditions['temp_C']):g} degC: model {_comment(curve.model)}, "
                     "parameters " + _comment(", ".join(
                         f"{k}={float(curve.params[k])!r}" for k in curve.param_names)))
    if source_note:
        lines.append(f"* {_comment(source_note)}")
    if esr_ohm is not None:
        lines.append(f"* ESR {esr_ohm!r} ohm")
    else:
        lines.append("* ESR not known: no series resistor in this model")
    lines.append(f".subckt {name} a b params: T_C={USE_CIRCUIT_TEMP:g}")
    q_all = " + ".join(terms)
    if esr_ohm is not None:
        lines += [f"C1 a n1 Q={{{q_all}}}", f"R1 n1 b {esr_ohm!r}"]
    else:
        lines.append(f"C1 a b Q={{{q_all}}}")
    lines.append(f".ends {name}")
    return "\n".join(lines) + "\n"
