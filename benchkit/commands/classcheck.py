"""`benchkit class-check`: does each measured sample keep its EIA-198 class code over temperature?

Exit code as `benchkit verify`: 0 conforming, 1 nonconforming, 3 not decidable, 2 bad input.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from benchkit.errors import EXIT_FAILED, EXIT_OK, EXIT_UNDECIDED, UserError

EPILOG = (
    "Checks C(0 V, T)/C(0 V, 25 degC) of every sample against the class code's band over the "
    "code's temperature range (EIA-198), with the decision rules of 'benchkit verify' "
    "(guarded by default). Conformity needs measured temperatures covering the whole range; "
    "one temperature proven outside the band is enough for nonconformity. Exit codes: "
    "0 conforming, 1 nonconforming, 3 not decidable, 2 bad input."
)


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "class-check", help="check measured C(T) against the part's EIA-198 class code",
        description="Fit each sample of the runs at each measured temperature (or read C(V, T) "
                    "family documents) and judge the change from 25 degC against the class "
                    "code's band.", epilog=EPILOG)
    p.add_argument("inputs", nargs="+", metavar="RUN_DIR|FAMILY.json",
                   help="run directories measured at several temperatures, or curve families")
    p.add_argument("--code", help="class code to check against (default: each part's own, "
                                  "from --parts)")
    p.add_argument("--parts", metavar="PARTS.toml", help="parts file with the class codes "
                                                           "(default: the demo catalogue)")
    p.add_argument("--part", help="only this part id")
    p.add_argument("--rule", choices=("simple", "guarded"), default="guarded",
                   help="decision rule (default guarded)")
    p.add_argument("--k", type=float, default=2.0, help="coverage factor (default 2)")
    p.add_argument("--branch", choices=("rising", "falling"), default="rising",
                   help="sweep branch of the runs (default rising)")
    p.add_argument("--model", default="auto", help="fit model for run directories (default auto)")
    p.add_argument("--out", metavar="REPORT.json", help="also write the decisions as JSON")
    p.add_argument("--families", metavar="DIR", help="also write each sample's C(V, T) family "
                                                     "document there (for 'benchkit export')")
    p.set_defaults(func=run)


def run(args) -> int:
    from benchkit.verify import classinputs
    from benchkit.verify.classcode import check_class_code, combine_checks
    from benchkit.verify.decision import CONFORMING, NONCONFORMING

    if not (math.isfinite(args.k) and args.k > 0):
        raise UserError(f"--k {args.k!r}: the coverage factor must be a positive number")
    code_override = classinputs.class_code(args.code) if args.code else None
    families = classinputs.load_families(args.inputs, args.branch, args.model, args.part)
    codes = {} if code_override else classinputs.codes_of_parts(
        {f.part_id for f in families}, args.parts)
    checks = []
    for fam in families:
        code = code_override or codes[fam.part_id]
        checks.append(check_class_code(fam, code, rule=args.rule, k=args.k))
    for c in checks:
        print(f"{c.who}: {c.code} {c.verdict} ({c.reason})")
    by_part: dict[str, list] = {}
    for fam, c in zip(families, checks):
        by_part.setdefault(fam.part_id, []).append(c)
    verdicts = {}
    for pid, cs in sorted(by_part.items()):
        verdicts[pid] = combine_checks(cs)
        print(f"part {pid} ({cs[0].code}): {verdicts[pid]} over {len(cs)} sample(s) "
              f"(rule: {args.rule}, k = {args.k:g})")
    if args.out:
        from benchkit.atomic import write_text_atomic

        doc = {"format": "benchkit-class-check", "version": 1, "rule": args.rule, "k": args.k,
               "parts": verdicts, "samples": [c.to_dict() for c in checks]}
        write_text_atomic(Path(args.out), json.dumps(doc, indent=2, allow_nan=False) + "\n")
        print(f"report: {args.out}")
    if args.families:
        from benchkit.atomic import write_text_atomic
        from benchkit.exports.paths import safe_stem

        for fam in families:
            stem = safe_stem(f"{fam.part_id}-{fam.sample_id}-{fam.branch}")
            path = write_text_atomic(Path(args.families) / f"{stem}.family.json", fam.to_json())
            print(f"family: {path}")
    overall = combine_checks(checks)
    return {CONFORMING: EXIT_OK, NONCONFORMING: EXIT_FAILED}.get(overall, EXIT_UNDECIDED)
