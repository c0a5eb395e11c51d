"""`benchkit export CURVE.json`: one curve document as a csv table, a JSON document or a SPICE subcircuit.

A C(V, T) family document (benchkit class-check --families) exports as one SPICE subcircuit
with the temperature as a parameter (benchkit/exports/spice_temp.py)."""

from __future__ import annotations

from pathlib import Path

from benchkit.errors import UserError
from benchkit.units import arg_type


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "export", help="export a curve document as csv, json or spice",
        description="Export one curve document (from 'benchkit fit' or the library) for other tools: "
                    "csv (bias_V, C_F, delta_C_pct, u_C_F over the valid range), json (the curve "
                    "document), spice (a charge-conserving nonlinear capacitor subcircuit for ngspice, "
                    "with its ESR as a series resistor). With --bias, for a curve measured against "
                    "frequency: touchstone (.s1p, or .s2p with --fixture series-through|shunt-through; "
                    "version 2 with --touchstone-version 2), spice (a linear subcircuit right in AC "
                    "analysis at that bias), csv (|Z|, ESR, ESL, C against frequency).")
    p.add_argument("curve", metavar="CURVE.json")
    p.add_argument("--format", choices=("csv", "json", "spice", "touchstone"), required=True)
    p.add_argument("--out", required=True, metavar="FILE")
    p.add_argument("--esr", type=arg_type("ohm", "--esr"), metavar="OHM",
                   help="series resistance for the SPICE model (none when not given)")
    p.add_argument("--name", metavar="NAME", help="SPICE subcircuit name (default: from the part id)")
    p.add_argument("--points", type=int, metavar="N",
                   help="rows of the csv table (default 51; 201 frequencies with --bias)")
    p.add_argument("--bias", type=arg_type("V", "--bias"), metavar="VOLTS",
                   help="the bias of a wideband export (touchstone, or csv/spice against frequency)")
    p.add_argument("--fixture", choices=("one-port", "series-through", "shunt-through"),
                   help="Touchstone fixture: .s1p is one-port; .s2p needs series- or shunt-through")
    p.add_argument("--touchstone-version", choices=("1", "2"), default="1",
                   help="Touchstone version (2 writes the 2.0 keywords)")
    p.set_defaults(func=run)


def run(args) -> int:
    from benchkit.exports import export_curve
    from benchkit.library.fitsbridge import curve_from_json

    src = Path(args.curve)
    try:
        text = src.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{src}: no such curve file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{src}: unreadable ({exc})") from None
    if '"benchkit-curve-family"' in text:
        return _export_family(src, text, args)
    curve = curve_from_json(text, str(src))
    target = export_curve(curve, args.format, args.out, esr_ohm=args.esr, name=args.name, n_points=args.points,
                          source_note=f"curve document {src.name}", bias_V=args.bias,
                          fixture=args.fixture, touchstone_version=args.touchstone_version)
    print(f"{src} -> {target}")
    return 0


def _export_family(src: Path, text: str, args) -> int:
    from benchkit.atomic import write_text_atomic
    from benchkit.exports.spice_temp import spice_family_subcircuit
    from fits.errors import FitsError
    from fits.family import CurveFamily

    if args.format != "spice":
        raise UserError(f"{src}: a C(V, T) family exports as --format spice only (or export "
                        "one of its member curves)")
    try:
        family = CurveFamily.from_json(text, str(src))
    except FitsError as exc:
        raise UserError(str(exc)) from None
    netlist = spice_family_subcircuit(family, name=args.name, esr_ohm=args.esr,
                                      source_note=f"curve family {src.name}")
    target = write_text_atomic(Path(args.out), netlist)
    print(f"{src} -> {target}")
    return 0
