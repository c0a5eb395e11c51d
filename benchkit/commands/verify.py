"""`benchkit verify`: judge measured samples against a supplier's claimed C(V) curve.

Exit code: 0 conforming, 1 nonconforming, 3 not decidable, 2 bad input (nothing written).
"""

from __future__ import annotations

import json
import math

from benchkit.errors import EXIT_FAILED, EXIT_OK, EXIT_UNDECIDED, UserError
from benchkit.verify.decision import CONFORMING, NONCONFORMING, RULES

EXIT_BY_VERDICT = {CONFORMING: EXIT_OK, NONCONFORMING: EXIT_FAILED}

EPILOG = (
    "Exit codes: 0 conforming, 1 nonconforming, 3 not decidable, 2 bad input (no report "
    "written). The decision rule is agreed with the customer (ISO/IEC 17025:2017 7.1.3); "
    "'guarded' is ILAC-G8:09/2019 guarded acceptance with w = U plus the ISO 14253-1 zones, "
    "'simple' is simple acceptance (w = 0). The meter accuracy default is a typical bench "
    "figure: give your meter's own for its range, frequency and level."
)


def register(subparsers) -> None:
    from benchkit.units import arg_type
    from benchkit.verify.uncertainty import DEFAULT_METER_ACCURACY_PCT

    p = subparsers.add_parser(
        "verify", help="verify a supplier's claimed C(V) curve against measured samples",
        description="Compare every measured sample of the claimed part with a supplier's "
                    "claimed curve, point by point with its expanded uncertainty, and decide "
                    "per sample and per lot. Writes REPORT_DIR/report.html and report.json.",
        epilog=EPILOG)
    p.add_argument("inputs", nargs="+", metavar="RUN_DIR|CURVE.json",
                   help="run directories (fitted here) or curve documents")
    p.add_argument("--claim", required=True, metavar="CLAIM.csv", help="the claim file")
    p.add_argument("--out", required=True, metavar="REPORT_DIR", help="where the report goes")
    p.add_argument("--tolerance", help="band around the claimed curve, overriding the claim's "
                                       "(IEC 60062 letter, '10%%', '+80/-20%%')")
    p.add_argument("--rule", choices=RULES, default="guarded", help="decision rule (default guarded)")
    p.add_argument("--part", help="part ID to take from the inputs (default: the claim's)")
    p.add_argument("--k", type=float, default=2.0, help="coverage factor (default 2, about 95 %%)")
    p.add_argument("--meter-accuracy-pct", type=float, default=DEFAULT_METER_ACCURACY_PCT,
                   help=f"meter basic accuracy, %% of reading, rectangular half-width "
                        f"(default {DEFAULT_METER_ACCURACY_PCT:g}, a typical bench figure)")
    p.add_argument("--branch", choices=("rising", "falling"), default="rising",
                   help="sweep branch of the runs to fit (default rising)")
    p.add_argument("--model", default="auto", help="fit model for run directories (default auto)")
    p.add_argument("--measured-age-h", type=float,
                   help="hours since the last heat of the measured samples, if the runs lack it")
    p.add_argument("--aging-k", type=float, metavar="PCT_PER_DECADE",
                   help="aging rate for the age normalisation (default: typical for the class)")
    p.add_argument("--accept-other-conditions", action="store_true",
                   help="judge samples measured at another frequency, AC level or temperature than "
                        "the claim's as if at the claim's (recorded in the report); otherwise they "
                        "are not decidable (exit 3)")
    p.add_argument("--lot-size", type=arg_type("count", "--lot-size"),
                   help="lot size, to judge the lot by ISO 2859-1 (2000, 10k)")
    p.add_argument("--aql", type=float, default=1.0, help="AQL in %% with --lot-size (default 1.0)")
    p.add_argument("--level", default="II", help="inspection level with --lot-size (default II)")
    p.add_argument("--operator", metavar="NAME",
                   help="who judged (shown in the report's identity block; default: the operator "
                        "recorded in run.json, else 'not recorded')")
    p.add_argument("--json", action="store_true",
                   help="print the verification (the report's JSON document) on stdout")
    p.set_defaults(func=run)


def run(args) -> int:
    from benchkit.catalogue.codes import parse_tolerance
    from benchkit.verify import compare, measured
    from benchkit.verify.claims import load_claim
    from benchkit.verify.identity import check_operator
    from benchkit.verify.report import write_report
    from benchkit.verify.sampling import plan_for_lot

    if not (math.isfinite(args.k) and args.k > 0):
        raise UserError(f"--k {args.k!r}: the coverage factor must be a positive number")
    if not (math.isfinite(args.meter_accuracy_pct) and args.meter_accuracy_pct >= 0):
        raise UserError("--meter-accuracy-pct must be a number >= 0")
    if args.measured_age_h is not None and not (args.measured_age_h > 0):
        raise UserError("--measured-age-h must be a positive number of hours")
    if args.aging_k is not None and not (math.isfinite(args.aging_k) and args.aging_k >= 0):
        raise UserError("--aging-k must be a number >= 0 (percent per decade)")
    operator = check_operator(getattr(args, "operator", None))
    claim = load_claim(args.claim)
    if args.tolerance is not None:
        tol = parse_tolerance(args.tolerance)
    elif claim.tolerance is not None:
        tol = claim.tolerance
    else:
        raise UserError(f"{args.claim}: the claim states no tolerance; add '# tolerance = ...' "
                        f"or give --tolerance")
    plan = plan_for_lot(args.lot_size, args.aql, args.level) if args.lot_size is not None else None
    part_id = args.part or claim.part_id
    samples, skipped = measured.load_inputs(args.inputs, part_id, args.branch, args.model,
                                            args.measured_age_h, temp_C=claim.temp_C)
    v = compare.verify(claim, samples, skipped, tol, args.rule, args.k,
                       args.meter_accuracy_pct, args.aging_k, plan,
                       accept_other_conditions=args.accept_other_conditions)
    html_path, json_path = write_report(v, args.out, inputs=args.inputs, operator=operator)
    if args.json:
        print(json_path.read_text(encoding="utf-8"), end="")
        return EXIT_BY_VERDICT.get(v.verdict, EXIT_UNDECIDED)
    for s in v.samples:
        print(f"{s.sample.sample_id}: {s.verdict}" + (f"  [{'; '.join(s.flags)}]" if s.flags else ""))
        for line in sample_details(s):
            print(f"    {line}")
    for k in skipped:
        print(f"skipped {k.sample_id} ({k.part_id}): {k.reason}")
    print(f"lot of {part_id}: {v.verdict} (rule: {args.rule}, k = {args.k:g}; {v.lot.rule})")
    print(f"report: {html_path}")
    print(f"        {json_path}")
    print(f"report id: {json.loads(json_path.read_text(encoding='utf-8'))['identity']['report_id']}")
    return EXIT_BY_VERDICT.get(v.verdict, EXIT_UNDECIDED)


def sample_details(s) -> list[str]:
    """Why a sample got its verdict, in plain words: its worst point, and what was not decidable."""
    from benchkit.verify.margins import worst

    out = []
    decided = [p for p in s.points if p.measured_F is not None and p.budget is not None]
    w = worst(decided)
    if w is not None:
        out.append(f"worst point {w.text()}")
    outside = [p for p in s.points if p.measured_F is None]
    if outside:
        lo, hi = s.sample.curve.valid_range_V
        volts = ", ".join(f"{p.bias_V:g}" for p in outside)
        out.append(f"not decidable at {volts} V: outside the measured range {lo:.4g}..{hi:.4g} V "
                   f"of this branch (curves are never extrapolated)")
    zone = [p for p in decided if p.decision.verdict == "not decidable"]
    if zone:
        volts = ", ".join(f"{p.bias_V:g}" for p in zone)
        out.append(f"not decidable at {volts} V: within U of a tolerance limit (between the "
                   f"acceptance and rejection limits of the rule)")
    return out
