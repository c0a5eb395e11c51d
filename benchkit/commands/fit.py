"""`benchkit fit RUN_DIR`: fit a C(V) model to each sample of a run and write curve documents.

Input: RUN_DIR/run.json and RUN_DIR/points.csv (CONTRACTS.md section 5, read with
benchkit.runlog). x = bias_set_V, y = C_F; weights 1/sigma with sigma = C_std_F/sqrt(n_readings)
when every point of the sample has it, otherwise fits weights from repeated biases.
Points flagged "overload" are left out (as the library and verification do); more flags can be
excluded with --exclude-flag.

Output, decided by the number of samples:
- one sample (or --sample ID): --out is a FILE; the rising branch (the primary curve) goes
  there and the falling branch, if measured, beside it as <stem>-falling<suffix>;
- several samples: --out is a DIRECTORY holding <sample_id>-<branch>.json for each;
  an --out that exists as a directory (or ends in '/') is always used as a directory.
--plot FILE.png|FILE.pdf draws data, fits, bands and residuals (both branches) per sample;
with several samples the sample id is added to the file name (<stem>-<sample_id><suffix>).
Everything is fitted and rendered in memory first; nothing is written if any sample fails.
"""

from __future__ import annotations

import math
import re
from collections import defaultdict
from pathlib import Path

import numpy as np

from benchkit import runlog
from benchkit.atomic import write_bytes_atomic, write_text_atomic
from benchkit.errors import UserError

MODELS = ("auto", "tanh", "poly", "landau", "table")
DEFAULT_EXCLUDE = ("overload",)
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "fit",
        help="fit C(V) models to a measured run and write curve documents",
        description="Fit a compact C(V) model (tanh-type, polynomial, Landau-type, or a PCHIP "
                    "table) to each sample and sweep branch of a run directory, with parameter "
                    "uncertainties, and write one curve document (JSON) per sample and branch.",
        epilog="With one sample --out names the curve file of the rising branch (the falling "
               "branch goes to <stem>-falling.json); with several samples --out is a directory "
               "of <sample_id>-<branch>.json files. 'auto' ranks tanh, poly and landau by BIC.",
    )
    p.add_argument("run_dir", metavar="RUN_DIR", help="run directory written by 'benchkit measure'")
    p.add_argument("--model", choices=MODELS, default="auto",
                   help="model to fit (default: auto = lowest BIC of tanh, poly, landau)")
    p.add_argument("--sample", metavar="ID", help="fit only this sample")
    p.add_argument("--out", required=True, metavar="CURVE.json|DIR",
                   help="curve file (one sample) or directory (several samples)")
    p.add_argument("--plot", metavar="FILE", help="also draw the fit (.png or .pdf)")
    p.add_argument("--exclude-flag", action="append", default=[], metavar="WORD",
                   help="also leave out points carrying this flag (repeatable; 'overload' "
                        "points are always left out)")
    p.add_argument("--separate-branches", action="store_true",
                   help="fit the tanh model to each branch on its own instead of sharing its "
                        "shape between rising and falling")
    p.add_argument("--report", action="store_true", help="print the full fit report")
    p.set_defaults(func=run)


def _num(row: dict, col: str, path: Path, line: int, required: bool = True) -> float:
    text = row[col].strip()
    if text == "":
        if required:
            raise UserError(f"{path}: line {line}: column '{col}' is empty; every used point "
                            "needs it")
        return math.nan
    try:
        return float(text)
    except ValueError:
        raise UserError(f"{path}: line {line}: column '{col}': {text!r} is not a number") from None


def _read_samples(run_dir: Path, only: str | None, exclude: set[str]):
    """{sample_id: dict(part_id, V, C, sigma, branch, temp, rows)} and the count left out."""
    meta = runlog.read_run(run_dir)
    rows, _ = runlog.read_points(run_dir)
    path = run_dir / runlog.POINTS_FILE
    if not rows:
        raise UserError(f"{path}: no measured points; measure the run (or resume it) first")
    samples_in_run = sorted({r["sample_id"] for r in rows})
    if only is not None and only not in samples_in_run:
        raise UserError(f"--sample {only}: not in {path} (samples: {', '.join(samples_in_run)})")
    grouped: dict[str, list[tuple[int, dict]]] = defaultdict(list)
    left_out = 0
    for line, r in enumerate(rows, start=2):
        if only is not None and r["sample_id"] != only:
            continue
        if exclude & set(filter(None, r["flags"].split(";"))):
            left_out += 1
            continue
        grouped[r["sample_id"]].append((line, r))
    if not grouped:
        raise UserError(f"{path}: every point of the selection carries an excluded flag "
                        f"({', '.join(sorted(exclude))}); nothing to fit")
    out = {}
    for sid, items in grouped.items():
        V, C, S, temp, labels = [], [], [], [], []
        for line, r in items:
            if r["branch"] not in ("rising", "falling"):
                raise UserError(f"{path}: line {line}: column 'branch': {r['branch']!r} is not "
                                "'rising' or 'falling'")
            v = _num(r, "bias_set_V", path, line)
            c = _num(r, "C_F", path, line)
            if not (math.isfinite(v) and math.isfinite(c)):
                raise UserError(f"{path}: line {line}: bias_set_V/C_F must be finite numbers")
            if c <= 0:
                raise UserError(f"{path}: line {line}: C_F = {c!r} is not a positive "
                                "capacitance; check the meter function and range")
            std = _num(r, "C_std_F", path, line, required=False)
            n = _num(r, "n_readings", path, line, required=False)
            S.append(std / math.sqrt(n) if (n >= 1 and math.isfinite(std)) else math.nan)
            V.append(v)
            C.append(c)
            temp.append(_num(r, "temp_C", path, line, required=False))
            labels.append(r["branch"])
        S_arr = np.array(S)
        sigma = S_arr if np.all(np.isfinite(S_arr) & (S_arr > 0)) else None
        out[sid] = {
            "part_id": items[0][1]["part_id"] or None,
            "V": np.array(V), "C": np.array(C), "sigma": sigma,
            "branch": np.array(labels, dtype=object), "temp": np.array(temp),
            "rows": [r for _, r in items],
        }
    return meta, path, out, left_out


def _conditions(meta: dict, rows: list[dict], temp: np.ndarray) -> dict:
    """Conditions of the fitted points: the points' own columns, else run.json."""
    cond = meta.get("conditions") or {}

    def median(col):
        vals = []
        for r in rows:
            try:
                vals.append(float(r[col]))
            except (TypeError, ValueError):
                pass
        vals = [v for v in vals if math.isfinite(v)]
        return float(np.median(vals)) if vals else None

    functions = sorted({r["function"] for r in rows if r["function"]})
    t = temp[np.isfinite(temp)]
    return {
        "freq_Hz": median("freq_Hz") if median("freq_Hz") is not None else cond.get("freq_Hz"),
        "ac_level_Vrms": (median("ac_level_set_Vrms") if median("ac_level_set_Vrms") is not None
                          else cond.get("ac_level_Vrms")),
        "temp_C": float(np.mean(t)) if t.size else None,
        "function": functions[0] if len(functions) == 1 else cond.get("function"),
    }


def _out_paths(out_arg: str, sample_ids: list[str], branches: dict[str, list[str]]):
    out = Path(out_arg)
    dir_mode = out.is_dir() or out_arg.endswith(("/", "\\")) or len(sample_ids) > 1
    if len(sample_ids) > 1 and out.suffix.lower() == ".json" and not out.is_dir():
        raise UserError(f"--out {out_arg}: the run has {len(sample_ids)} samples "
                        f"({', '.join(sample_ids)}); give a directory for --out, or fit one "
                        "sample with --sample ID")
    if not dir_mode and out.exists() and not out.is_file():
        raise UserError(f"--out {out_arg}: exists and is not a file")
    paths = {}
    for sid in sample_ids:
        present = branches[sid]
        primary = "rising" if "rising" in present else present[0]
        for b in present:
            if dir_mode:
                paths[(sid, b)] = out / f"{_SAFE.sub('_', sid)}-{b}.json"
            elif b == primary:
                paths[(sid, b)] = out
            else:
                paths[(sid, b)] = out.with_name(f"{out.stem}-{b}{out.suffix}")
    return paths


def run(args) -> int:
    import fits
    from fits import plots

    run_dir = Path(args.run_dir)
    if not run_dir.is_dir():
        raise UserError(f"{run_dir}: not a directory; give the run directory 'benchkit "
                        "measure --out' wrote")
    unknown = sorted(set(args.exclude_flag) - set(runlog.FLAGS))
    if unknown:
        raise UserError(f"--exclude-flag {unknown[0]}: not a points flag (known: "
                        f"{', '.join(sorted(runlog.FLAGS))})")
    if args.plot and Path(args.plot).suffix.lower() not in plots.FORMATS:
        raise UserError(f"--plot {args.plot}: use a .png or .pdf file name")
    exclude = set(DEFAULT_EXCLUDE) | set(args.exclude_flag)
    meta, points_path, samples, left_out = _read_samples(run_dir, args.sample, exclude)
    sha = runlog.sha256_file(points_path)
    if meta.get("points_sha256") and meta["points_sha256"] != sha:
        raise UserError(f"{points_path}: sha256 differs from the one in run.json; the points "
                        "were changed after the run ended, so they are not fitted")

    outcomes = {}
    for sid in sorted(samples):
        s = samples[sid]
        source = {"points_sha256": sha, "run_id": meta.get("run_id"), "sample_id": sid,
                  "part_id": s["part_id"]}
        try:
            outcomes[sid] = fits.fit_branches(
                s["V"], s["C"], s["branch"], s["sigma"], model=args.model,
                shared_shape=not args.separate_branches,
                conditions=_conditions(meta, s["rows"], s["temp"]), source=source,
                part_id=s["part_id"], sample_id=sid)
        except fits.FitsError as exc:
            raise UserError(f"{points_path}: sample {sid}: {exc}") from None

    sample_ids = sorted(outcomes)
    paths = _out_paths(args.out, sample_ids,
                       {sid: list(o.outcomes) for sid, o in outcomes.items()})
    texts = {key: outcomes[key[0]].outcomes[key[1]].curve.to_json() for key in paths}
    figures = {}
    if args.plot:
        plot = Path(args.plot)
        for sid in sample_ids:
            target = plot if len(sample_ids) == 1 else plot.with_name(
                f"{plot.stem}-{_SAFE.sub('_', sid)}{plot.suffix}")
            fig = outcomes[sid].plot()
            figures[target] = plots.figure_bytes(fig, plot.suffix)

    for key, path in paths.items():
        write_text_atomic(path, texts[key])
    for path, data in figures.items():
        write_bytes_atomic(path, data)

    status = meta.get("status")
    if status != "complete":
        print(f"note: run status is {status!r}"
              + (f" ({meta.get('reason')})" if meta.get("reason") else "")
              + "; fitted the points it holds")
    if left_out:
        print(f"note: {left_out} point(s) left out for flags {', '.join(sorted(exclude))}")
    for (sid, b), path in paths.items():
        o = outcomes[sid].outcomes[b]
        c, st = o.curve, o.curve.stats
        lo, hi = c.valid_range_V
        ranking = ", ".join(f"{n} {bic:.1f}" for n, _, bic in o.ranking if math.isfinite(bic))
        print(f"{sid} {b}: {c.model} ({st['variant']}), R^2 {st['r2']:.6f}, RMS "
              f"{st['rms_pct_C0']:.3g} % of C0, {lo:g} V to {hi:g} V"
              + (f"; BIC {ranking}" if len(o.ranking) > 1 else "") + f" -> {path}")
        if args.report:
            print(o.report)
    for path in figures:
        print(f"plot -> {path}")
    return 0
