"""`benchkit fit RUN_DIR`: fit a C(V) model to each sample of a run and write curve documents.

Input: RUN_DIR/run.json and RUN_DIR/points.csv (DEVELOPERS.md, "File formats": run directory, read with
benchkit.sweep.rundir, as the library and verification read them). x = bias_set_V, y = C_F; weights
1/sigma with sigma = C_std_F/sqrt(n_readings) when every point of the sample has it, otherwise
fits weights from repeated biases. Points flagged overload, current_limit or bias_readback
(benchkit.sweep.rundir.LEFT_OUT_FLAGS) are left out; more flags can be excluded with --exclude-flag.

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

import json
import re
import sys
from pathlib import Path

from benchkit.sweep import runlog
from benchkit.atomic import write_bytes_atomic, write_text_atomic
from benchkit.errors import UserError

MODELS = ("auto", "tanh", "genjohnson", "poly", "landau", "table")
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "fit",
        help="fit C(V) models to a measured run and write curve documents",
        description="Fit a compact C(V) model (tanh-type, generalised Johnson, Landau-type, "
                    "polynomial, or a PCHIP table) to each sample and sweep branch of a run "
                    "directory, with parameter uncertainties, and write one curve document "
                    "(JSON) per sample and branch. Each line says whether the fitted law "
                    "describes the data, or that the part is flat within noise.",
        epilog="With one sample --out names the curve file of the rising branch (the falling "
               "branch goes to <stem>-falling.json); with several samples --out is a directory "
               "of <sample_id>-<branch>.json files. 'auto' chooses by leave-one-out prediction "
               "error, preferring a compact law when it is as good.",
    )
    p.add_argument("run_dir", metavar="RUN_DIR", help="run directory written by 'benchkit measure'")
    p.add_argument("--model", choices=MODELS, default="auto",
                   help="model to fit (default: auto = best leave-one-out prediction, compact "
                        "law preferred when as good)")
    p.add_argument("--sample", metavar="ID", help="fit only this sample")
    p.add_argument("--out", required=True, metavar="CURVE.json|DIR",
                   help="curve file (one sample) or directory (several samples)")
    p.add_argument("--plot", metavar="FILE", help="also draw the fit (.png or .pdf)")
    p.add_argument("--exclude-flag", action="append", default=[], metavar="WORD",
                   help="also leave out points carrying this flag (repeatable; points "
                        "flagged overload, current_limit or bias_readback are always left out)")
    p.add_argument("--separate-branches", action="store_true",
                   help="fit the tanh model to each branch on its own instead of sharing its "
                        "shape between rising and falling")
    p.add_argument("--report", action="store_true", help="print the full fit report")
    p.add_argument("--json", action="store_true", help="print the fitted curves' summary as JSON")
    p.set_defaults(func=run)


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
    from fits.report import verdict

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
    from benchkit.sweep import rundir  # numpy and the fits stack load only when fitting

    run_data = rundir.read_run_dir(run_dir, sample=args.sample, extra_flags=args.exclude_flag)
    meta, points_path, sha = run_data.meta, run_data.points_path, run_data.points_sha256
    samples = run_data.with_points()

    outcomes = {}
    for sid in sorted(samples):
        s = samples[sid]
        source = {"points_sha256": sha, "run_id": meta.get("run_id"), "sample_id": sid,
                  "part_id": s.part_id}
        try:
            outcomes[sid] = fits.fit_branches(
                s.bias_V, s.C_F, s.branch, s.sigma_F, model=args.model,
                shared_shape=not args.separate_branches,
                conditions=rundir.fit_conditions(meta, s.rows), source=source,
                part_id=s.part_id, sample_id=sid)
        except fits.FitsError as exc:
            raise UserError(f"{points_path}: sample {sid}: {exc}") from None

    from benchkit.sweep.impedance import wideband_model

    all_rows, _ = runlog.read_points(run_dir)
    for sid, o in outcomes.items():  # Z(f) per bias, when the plan had a frequency list
        wb = wideband_model(all_rows, sid, {"freq_list": (meta.get("frequency_list") or {}).get("freq_Hz")},
                            str(points_path))
        if wb is not None:
            primary = "rising" if "rising" in o.outcomes else next(iter(o.outcomes))
            o.outcomes[primary].curve.wideband = wb
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
            part = _part_of(meta, sid)
            fig = plots.plot_fits(list(outcomes[sid].outcomes.values()),
                                  nominal_C_F=part.get("nominal_C_F"), rated_V=part.get("rated_V"))
            figures[target] = plots.figure_bytes(fig, plot.suffix)

    for key, path in paths.items():
        write_text_atomic(path, texts[key])
    for path, data in figures.items():
        write_bytes_atomic(path, data)

    status = meta.get("status")
    if status != "complete":
        print(f"benchkit fit: note: run status is {status!r}"
              + (f" ({meta.get('reason')})" if meta.get("reason") else "")
              + "; fitted the points it holds", file=sys.stderr)
    if run_data.left_out:
        print(f"benchkit fit: note: {run_data.left_out} point(s) left out for flags "
              f"{', '.join(sorted(run_data.left_out_flags))}", file=sys.stderr)
    if args.json:
        print(json.dumps({"run_id": meta.get("run_id"), "points_sha256": sha, "curves": [
            {"sample_id": sid, "branch": b, "path": str(path),
             "model": outcomes[sid].outcomes[b].curve.model,
             "valid_range_V": list(outcomes[sid].outcomes[b].curve.valid_range_V),
             "stats": outcomes[sid].outcomes[b].curve.stats}
            for (sid, b), path in paths.items()], "plots": [str(p) for p in figures]},
            indent=2, default=str))
        return 0
    for (sid, b), path in paths.items():
        o = outcomes[sid].outcomes[b]
        c, st = o.curve, o.curve.stats
        lo, hi = c.valid_range_V
        if c.model == "table":
            quality = "table through the points"
        elif st.get("flat"):
            quality = f"flat within noise (max |residual| {st['max_resid_pct_C0']:.3g} % of C0)"
        else:
            quality = f"R^2 {st['r2']:.6f}, RMS {st['rms_pct_C0']:.3g} % of C0"
        print(f"{sid} {b}: {_model_text(c.model, st.get('variant'))}, {quality}, {lo:g} V to {hi:g} V"
              + (f"; chosen over {', '.join(n for n, *_ in o.ranking[1:])} by leave-one-out "
                 "prediction" if len(o.ranking) > 1 else "") + f" -> {path}")
        if c.model != "table" and not st.get("describes_data", True):
            print(f"  {sid} {b}: {verdict(st)}")
        if args.report:
            print(o.report)
    for path in figures:
        print(f"plot -> {path}")
    return 0


def _model_text(model: str, variant) -> str:
    """'poly (degree 8)', not 'poly (poly degree 8)': the variant without the model's name again."""
    v = str(variant or "").strip()
    if v.startswith(model):
        v = v[len(model):].strip(" ,:")
    return f"{model} ({v})" if v and v != model else model


def _part_of(meta: dict, sample_id: str) -> dict:
    """The catalogue fields run.json recorded for a sample's part (nominal, rated voltage), or {}."""
    for s in meta.get("samples") or []:
        if isinstance(s, dict) and s.get("sample_id") == sample_id and isinstance(s.get("part"), dict):
            return s["part"]
    return {}
