"""A curve as a SPICE subcircuit: a charge-conserving nonlinear capacitor plus its ESR.

    .subckt NAME a b
    C1 a n1 Q={Q(V(a,n1))}      charge expression from the model's closed-form (or exact) Q(V)
    R1 n1 b ESR                  series resistance at the measurement frequency
    .ends NAME

Why the charge and not C(V): a capacitor defined by C={C(V)} makes the simulator integrate
i = C(v)*dv/dt, which does not conserve charge over a cycle and converges badly; `Q={...}`
gives i = dQ/dt exactly [common practice; style notes on ngspice 39]. Q(V) is the model's
integral of C with Q(0) = 0, never C(V)*V [common practice].

The comment block states the conditions, the valid range (outside it the expression is the
model carried on; do not rely on it there) and the source run. A simulator needs a value at
every bias, so for a curve measured at one polarity only the other polarity is MIRRORED,
C(-V) = C(V) (the charge odd in V), and the header says so: the mirror is an assumption of
the export (an anhysteretic ceramic's C(V) is even in V [common practice]), never presented
as measured. The CSV table and the curve itself refuse the other polarity instead. Written for ngspice; the
`Q={}` charge form is ngspice syntax.
"""

from __future__ import annotations

import math
import re

from benchkit.errors import UserError
from benchkit.units import format_value

_IDENT = re.compile(r"[^A-Za-z0-9_]+")


def subckt_name(text: str) -> str:
    """A SPICE identifier from a part id: letters, digits and '_' only, starting with a letter."""
    name = _IDENT.sub("_", str(text)).strip("_") or "CAP"
    if not name[0].isalpha():
        name = "C_" + name
    return name[:64]


def _comment(text: str) -> str:
    """One comment line's content: no line breaks can smuggle netlist statements in."""
    return " ".join(str(text).split())


def _fmt(v, unit: str) -> str:
    return "?" if v is None else format_value(v, unit)


def spice_subcircuit(curve, *, name: str | None = None, esr_ohm: float | None = None,
                     source_note: str | None = None) -> str:
    """Netlist text of the subcircuit (ends with a newline)."""
    from benchkit.library.fitsbridge import fits_errors, model_spec

    spec = model_spec(curve.model, curve.param_names)
    params = dict(curve.params)
    name = subckt_name(name or curve.part_id or "CAP")
    if esr_ohm is not None:
        esr_ohm = float(esr_ohm)
        if not (math.isfinite(esr_ohm) and esr_ohm > 0):
            raise UserError(f"--esr {esr_ohm!r}: must be a positive resistance in ohms (or leave it out)")
    v = "V(a,n1)" if esr_ohm is not None else "V(a,b)"
    lo, hi = (float(x) for x in curve.valid_range_V)
    polarity = curve.measured_polarity
    try:
        q = spec.spice_charge(params, v)
        if polarity != "both":
            # mirrored: C(-V) = C(V), the charge odd in V (Q(-V) = -Q(V))
            q_mirror = spec.spice_charge(params, f"(-({v}))")
            wrong = "<" if polarity == "positive" else ">"
            q = f"((({v}) {wrong} 0) ? (-({q_mirror})) : ({q}))"
    except (NotImplementedError,) + fits_errors() as exc:
        raise UserError(f"curve model {curve.model!r}: no SPICE charge expression ({exc})") from None
    cond = dict(curve.conditions or {})
    src = dict(curve.source or {})
    lines = [
        f"* {name}: DC-bias capacitor model written by benchkit (charge-conserving, Q={{...}})",
        f"* part {_comment(curve.part_id)}  sample {_comment(src.get('sample_id') or curve.sample_id)}"
        f"  branch {_comment(src.get('branch') or curve.branch)}  origin {_comment(curve.origin)}",
        f"* model {_comment(curve.model)}: {_comment(getattr(spec, 'title', ''))}",
        "* parameters: " + _comment(", ".join(f"{k}={float(params[k])!r}" for k in curve.param_names)),
        f"* conditions: {_fmt(cond.get('freq_Hz'), 'Hz')}, {_fmt(cond.get('ac_level_Vrms'), 'Vrms')}, "
        f"{'?' if cond.get('temp_C') is None else format(float(cond['temp_C']), 'g')} degC, "
        f"function {_comment(cond.get('function'))}",
        f"* valid range: {lo:g} V to {hi:g} V measured; outside it the expression carries the model on:",
        "*   do not rely on it there",
        (f"* polarity: measured at {polarity} bias only; at {'negative' if polarity == 'positive' else 'positive'}"
         " bias the charge is MIRRORED (C(-V) = C(V), an assumption, not a measurement)"
         if polarity != "both" else "* polarity: measured at both polarities"),
        f"* C at {lo:g} V = {format_value(float(curve.C(lo)), 'F')}, "
        f"at {hi:g} V = {format_value(float(curve.C(hi)), 'F')}",
        f"* source run: {_comment(src.get('run_id'))}  points sha256 {_comment(src.get('points_sha256'))}",
    ]
    if source_note:
        lines.append(f"* {_comment(source_note)}")
    if esr_ohm is not None:
        freq = cond.get("freq_Hz")
        lines.append(f"* ESR {esr_ohm!r} ohm" + (f" (at {format_value(freq, 'Hz')})" if freq else ""))
    else:
        lines.append("* ESR not known: no series resistor in this model (export with --esr OHM to add one)")
    lines.append(f".subckt {name} a b")
    if esr_ohm is not None:
        lines.append(f"C1 a n1 Q={{{q}}}")
        lines.append(f"R1 n1 b {esr_ohm!r}")
    else:
        lines.append(f"C1 a b Q={{{q}}}")
    lines.append(f".ends {name}")
    return "\n".join(lines) + "\n"
