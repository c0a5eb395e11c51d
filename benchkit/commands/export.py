"""`benchkit export CURVE.json`: one curve document as a csv table, a JSON document or a SPICE subcircuit."""

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
                    "with its ESR as a series resistor).")
    p.add_argument("curve", metavar="CURVE.json")
    p.add_argument("--format", choices=("csv", "json", "spice"), required=True)
    p.add_argument("--out", required=True, metavar="FILE")
    p.add_argument("--esr", type=arg_type("ohm", "--esr"), metavar="OHM",
                   help="series resistance for the SPICE model (none when not given)")
    p.add_argument("--name", metavar="NAME", help="SPICE subcircuit name (default: from the part id)")
    p.add_argument("--points", type=int, metavar="N", help="rows of the csv table (default 51)")
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
    curve = curve_from_json(text, str(src))
    target = export_curve(curve, args.format, args.out, esr_ohm=args.esr, name=args.name, n_points=args.points,
                          source_note=f"curve document {src.name}")
    print(f"{src} -> {target}")
    return 0
