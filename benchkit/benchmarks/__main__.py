"""`python -m benchkit.benchmarks --out out/bench [--quick]`: run every benchmark."""

from __future__ import annotations

import argparse
import sys

from benchkit.benchmarks.runner import BENCHMARKS, failed, run_all


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(
        prog="python -m benchkit.benchmarks",
        description="Run the benchmarks of benchkit; write bench.json and bench.txt into --out.")
    ap.add_argument("--out", required=True, help="folder for bench.json, bench.txt and the runs")
    ap.add_argument("--quick", action="store_true",
                    help="small sizes (2 parts, fewer curves and repeats): checks that it runs")
    ap.add_argument("--only", action="append", choices=sorted(BENCHMARKS),
                    help="run only this benchmark (repeatable)")
    ap.add_argument("--part", action="append", dest="parts", metavar="PART_ID",
                    help="bench time: only this demo part (repeatable)")
    args = ap.parse_args(argv)
    results, table = run_all(args.out, quick=args.quick, only=args.only, parts=args.parts,
                             log=lambda s: print(s, file=sys.stderr, flush=True))
    print(table)
    bad = failed(results)
    if bad:
        print(f"benchmarks failed: {', '.join(bad)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
