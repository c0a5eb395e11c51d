"""`benchkit lot`: acceptance sampling of an incoming lot (ISO 2859-1 / ANSI/ASQ Z1.4).

    benchkit lot sample-size --lot-size 2000 [--level II] [--aql 1.0]
    benchkit lot table [--aql 1.0]
"""

from __future__ import annotations

import json
import sys

from benchkit.errors import EXIT_OK

NOTE = ("Single sampling, normal inspection. Table values other than lot 1201-3200 at level II "
        "(K, n = 125; AQL 1.0: 3/4, 2.5: 7/8) are from memory: check them against your copy of "
        "ISO 2859-1 before a contractual decision.")


def register(subparsers) -> None:
    from benchkit.units import arg_type
    from benchkit.verify.sampling import AQLS_PCT, LEVELS

    p = subparsers.add_parser("lot", help="acceptance sampling plans for an incoming lot (ISO 2859-1)",
                              description="Sample size and acceptance numbers for an incoming lot "
                                          "by ISO 2859-1 (ANSI/ASQ Z1.4).", epilog=NOTE)
    sub = p.add_subparsers(dest="lot_command", metavar="ACTION", parser_class=type(p))
    aqls = ", ".join(f"{a:g}" for a in AQLS_PCT)
    s = sub.add_parser("sample-size", help="code letter, sample size, Ac/Re for a lot",
                       description="Code letter, sample size and Ac/Re for a lot.", epilog=NOTE)
    s.add_argument("--lot-size", required=True, type=arg_type("count", "--lot-size"),
                   help="number of items in the lot (2000, 10k)")
    s.add_argument("--level", default="II", help=f"inspection level: {', '.join(LEVELS)} (default II)")
    s.add_argument("--aql", type=float, default=1.0, help=f"AQL in percent: {aqls} (default 1.0)")
    s.add_argument("--json", action="store_true", help="print the plan as JSON")
    s.set_defaults(func=run_sample_size)
    t = sub.add_parser("table", help="print the code-letter table and the normal-inspection table",
                       description="The tables this command uses.", epilog=NOTE)
    t.add_argument("--json", action="store_true", help="print the tables as JSON")
    t.set_defaults(func=run_table)
    p.set_defaults(func=lambda args: (p.print_help(sys.stderr), 2)[1])


def run_sample_size(args) -> int:
    from benchkit.verify.sampling import plan_for_lot

    plan = plan_for_lot(args.lot_size, args.aql, args.level)
    print(NOTE, file=sys.stderr)  # a caution about the table, not part of the answer
    if args.json:
        print(json.dumps({**plan.to_dict(), "inspection": "normal", "sampling": "single"}, indent=2))
        return EXIT_OK
    print(f"lot size {plan.lot_size}, inspection level {plan.level}, normal inspection, "
          f"AQL {plan.aql_pct:g} %")
    print(f"code letter {plan.table_letter} (ISO 2859-1 Table 1)")
    moved = f" (the table's arrow leads to the plan of letter {plan.letter})" \
        if plan.letter != plan.table_letter else ""
    print(f"sample size n = {plan.n}{moved}")
    if plan.full_inspection:
        print("the sample is as large as the lot: inspect every item")
    print(f"accept with at most Ac = {plan.Ac} nonconforming; reject with Re = {plan.Re} or more")
    return EXIT_OK


def run_table(args) -> int:
    from benchkit.verify.sampling import (AQLS_PCT, CODE_LETTER_TABLE, LEVELS,
                                          NORMAL_SINGLE_TABLE, SAMPLE_SIZE)

    print(NOTE, file=sys.stderr)
    if args.json:
        print(json.dumps({
            "code_letters": [{"lot_size_min": lo, "lot_size_max": hi,
                              "letters": dict(zip(LEVELS, letters.split()))}
                             for (lo, hi), letters in CODE_LETTER_TABLE],
            "normal_single": [{"letter": letter, "n": SAMPLE_SIZE[letter],
                               "Ac_Re_by_aql_pct": dict(zip((f"{a:g}" for a in AQLS_PCT), row.split()))}
                              for letter, row in NORMAL_SINGLE_TABLE.items()]}, indent=2))
        return EXIT_OK

    print("ISO 2859-1 Table 1, sample-size code letters")
    print(f"{'lot size':>18} " + " ".join(f"{lv:>4}" for lv in LEVELS))
    for (lo, hi), letters in CODE_LETTER_TABLE:
        rng = f"{lo}-{hi}" if hi is not None else f"{lo} and over"
        print(f"{rng:>18} " + " ".join(f"{x:>4}" for x in letters.split()))
    print()
    print("ISO 2859-1 Table 2-A, single sampling, normal inspection: Ac/Re "
          "(v: use the first plan below, ^: the first plan above)")
    print(f"{'letter':>6} {'n':>5} " + "".join(f"{a:>7g}" for a in AQLS_PCT))
    for letter, row in NORMAL_SINGLE_TABLE.items():
        print(f"{letter:>6} {SAMPLE_SIZE[letter]:>5} " + "".join(f"{c:>7}" for c in row.split()))
    return EXIT_OK
