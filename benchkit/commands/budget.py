"""`benchkit budget`: effective capacitance of a library part at an operating point.

Tolerance x DC bias x temperature x aging, each as nominal / typical / worst; how many in
parallel meet a needed capacitance at worst case; the RC time constant with a given resistor.
"""

from __future__ import annotations

import json
import math
import sys

from benchkit.errors import EXIT_OK, UserError


# A bank of more parts than this is no longer one design choice but a sign of a wrong value
# (common practice: boards parallel a handful to a few tens of MLCCs per rail).
MANY_IN_PARALLEL = 100


def register(subparsers) -> None:
    from benchkit.units import arg_type
    from benchkit.verify.budget import CAUTIONS

    p = subparsers.add_parser(
        "budget", help="effective capacitance of a part at a DC bias, temperature and age",
        description="What is left of a part's capacitance at an operating point, from the "
                    "library's measured DC-bias curve, its temperature behaviour (measured, or "
                    "the class code's bound), aging and the tolerance letter.",
        epilog=" ".join(CAUTIONS))
    p.add_argument("part", metavar="PART", help="in-house part number in the library")
    p.add_argument("--bias", required=True, type=arg_type("V", "--bias"), help="DC bias, V")
    p.add_argument("--temp", type=arg_type("degC", "--temp"), default=25.0,
                   help="temperature, degC (default 25; 85 or 85C)")
    p.add_argument("--age-hours", type=arg_type(None, "--age-hours"),
                   help="hours since the last heat at the time of use (default 1000, the "
                        "tolerance's reference age)")
    p.add_argument("--need", type=arg_type("F", "--need", ceramic=True),
                   help="capacitance needed at the operating point (e.g. 10u): parts in parallel")
    p.add_argument("--resistor", type=arg_type("ohm", "--resistor"),
                   help="series resistor (e.g. 1k5): RC time constant")
    p.add_argument("--library", metavar="FILE", help="library file (default: the usual one)")
    p.add_argument("--aging-k", type=float, metavar="PCT_PER_DECADE",
                   help="aging rate (default: typical for the class code, with its spread)")
    p.add_argument("--k", type=float, default=2.0, help="coverage factor on the fit (default 2)")
    p.add_argument("--json", action="store_true", help="print the budget as JSON")
    p.set_defaults(func=run)


def run(args) -> int:
    from benchkit.library import Library, default_library_path
    from benchkit.units import format_value
    from benchkit.verify.budget import CAUTIONS, from_library

    if args.age_hours is not None and not args.age_hours > 0:
        raise UserError("--age-hours must be a positive number of hours")
    if not (math.isfinite(args.k) and args.k >= 0):
        raise UserError("--k must be a number >= 0")
    from pathlib import Path

    path = Path(args.library) if args.library else default_library_path()
    if not path.exists():
        raise UserError(f"{path}: no library file; give --library or add curves with "
                        f"'benchkit library add'")
    with Library(path, create=False, readonly=True) as lib:
        part, b = from_library(lib, args.part, args.bias, args.temp, args.age_hours, args.need,
                               args.resistor, args.aging_k, args.k)
    if b.need_F is not None and (b.parallel_count or 0) > MANY_IN_PARALLEL:
        print(f"benchkit budget: note: {b.parallel_count} parts in parallel to reach "
              f"{format_value(b.need_F, 'F')}: check --need (a prefix missing?) or choose a larger part",
              file=sys.stderr)
    if args.json:
        doc = b.to_dict()
        doc["part"] = part.as_dict()
        print(json.dumps(doc, indent=2))
        return EXIT_OK
    print(f"{part.part_id}  {part.description}  (tolerance {part.tolerance}, {part.class_code})")
    print(f"operating point: {b.bias_V:g} V, {b.temp_C:g} degC, {b.age_h:g} h since the last heat")
    print(f"{'factor':<12} {'nominal':>8} {'typical':>8} {'worst':>8}  basis")
    for f in b.factors:
        print(f"{f.name:<12} {f.nominal:>8.4f} {f.typical:>8.4f} {f.worst:>8.4f}  {f.basis}")
    prod = {w: math.prod(getattr(f, w) for f in b.factors) for w in ("nominal", "typical", "worst")}
    print(f"{'product':<12} {prod['nominal']:>8.4f} {prod['typical']:>8.4f} {prod['worst']:>8.4f}")
    print(f"effective C: nominal {format_value(b.nominal_F, 'F')}, typical "
          f"{format_value(b.typical_F, 'F')}, worst case {format_value(b.worst_F, 'F')} "
          f"(= {format_value(b.nominal_C_F, 'F')} x product)")
    if b.need_F is not None:
        n = b.parallel_count
        print(f"to have {format_value(b.need_F, 'F')} at worst case: {n} in parallel "
              f"({format_value(n * b.worst_F, 'F')} worst case)")
    tau = b.tau_s()
    if tau:
        print(f"RC with {format_value(b.resistor_ohm, 'ohm')}: tau = {format_value(tau['nominal'], 's')} "
              f"nominal, {format_value(tau['typical'], 's')} typical, "
              f"{format_value(tau['worst'], 's')} worst case (small-signal, at the operating point)")
        if b.charge_time_s:
            print(f"large-signal charge 0 V -> 63.2 % of {b.bias_V:g} V through it: "
                  f"{format_value(b.charge_time_s['typical_to_63pct'], 's')} typical")
    for n in b.notes:
        print(f"note: {n}", file=sys.stderr)
    for c in CAUTIONS:
        print(f"caution: {c}", file=sys.stderr)
    return EXIT_OK
