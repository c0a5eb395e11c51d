"""`benchkit library ...`: keep, query and share the in-house curve library."""

from __future__ import annotations

import argparse
import json
import os
import sys
from contextlib import contextmanager
from pathlib import Path

from benchkit.bounded import loads_json
from benchkit.errors import UserError
from benchkit.units import arg_type, format_value

LIBRARY_HELP = (
    "library: an SQLite file, or a PostgreSQL server as postgresql://USER@HOST:PORT/DB; default "
    "$BENCHKIT_LIBRARY, else ~/.local/share/benchkit/library.sqlite "
    "($XDG_DATA_HOME/benchkit/library.sqlite when XDG_DATA_HOME is set)"
)

QUERY_RULES = """\
Rules of the query:
  effective capacitance = the differential C(V) of the stored curves (what a meter reads under bias);
  never extrapolated: a part none of whose curves reaches the bias is listed as NOT COVERED;
  temperature: curves measured within +-TEMP_TOL (default 2 degC) of --temp answer; otherwise C is
    interpolated linearly between the nearest curves below and above --temp; a temperature outside
    the curves a part holds is NOT COVERED (no extrapolation in temperature either);
  several curves (samples, branches) at one temperature: C = mean, u = sqrt(mean(u_i^2) + spread^2);
  origins are not mixed: lot summary first, then measured, then supplier claim;
  ranking: covered parts by C, largest first; then the parts not covered.
Values take engineering forms: 12, 12V, 12v, 4.7u, 4u7, 10uF, 100n; temperatures 85 or 85C."""


def _class_code(text: str) -> str:
    """--class: any case (x7r), checked against the codes of the trade, so a typo is refused
    instead of silently matching nothing."""
    from benchkit.catalogue.codes import parse_class_code

    try:
        return parse_class_code(text).code
    except UserError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "library", help="keep, query and export the in-house curve library",
        description="The in-house curve library: parts, runs and fitted curves in one SQLite file "
                    "that several benches may write at once.",
        epilog=f"The {LIBRARY_HELP}. Several processes may write one file at once.",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--library", metavar="FILE|URL", default=None, help=LIBRARY_HELP)
    sub = p.add_subparsers(dest="library_command", metavar="ACTION")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--library", metavar="FILE|URL", default=argparse.SUPPRESS, help=LIBRARY_HELP)

    def add(name, help_text, **kw):
        sp = sub.add_parser(name, parents=[common], help=help_text, description=help_text, **kw)
        return sp

    sp = add("add-parts", "add or update parts from a parts file (the catalogue fields are stored; "
                          "[part.sim] physics is not stored)")
    sp.add_argument("parts_file", metavar="PARTS.toml")
    sp.set_defaults(func=run, action=_add_parts)

    sp = add("add", "add a run directory (fitted, model auto; a part not yet in the library is filed "
                    "from the run's own catalogue copy), a curve document, a supplier's claim (CLAIM.csv, "
                    "filed as origin 'supplier claim') or a verification report (report.json)")
    sp.add_argument("source", metavar="RUN_DIR|CURVE.json|CLAIM.csv|report.json")
    sp.add_argument("--part", metavar="ID", help="part id (default: the run's only part, or the curve's own)")
    sp.add_argument("--all-parts", action="store_true", help="a run directory: add the curves of every part in it")
    sp.add_argument("--model", default="auto", help="model to fit a run with (default auto: chosen by the fit)")
    sp.add_argument("--esr", type=arg_type("ohm", "--esr"), metavar="OHM",
                    help="series resistance to store with a curve document (a run's own Rs/D is used otherwise)")
    sp.add_argument("--allow-incomplete", action="store_true",
                    help="also add a run whose run.json still says 'running'")
    sp.add_argument("--token-file", metavar="FILE",
                    help="with --library http://HOST:PORT (a 'benchkit serve' with a write token): the "
                         "token, read from FILE (or $BENCHKIT_SERVE_TOKEN), never given on the command line")
    sp.set_defaults(func=run, action=_add)

    sp = add("list", "list the parts and how many curves each has")
    sp.add_argument("--case", metavar="CODE", help="only this EIA case code, e.g. 0603")
    sp.add_argument("--class", dest="class_code", metavar="CODE", type=_class_code,
                    help="only this class code, e.g. X7R (any case)")
    sp.add_argument("--json", action="store_true", help="print the list as JSON")
    sp.set_defaults(func=run, action=_list)

    sp = add("show", "a part's catalogue fields and curves, and a PNG plot of every curve")
    sp.add_argument("part_id", metavar="ID")
    sp.add_argument("--plot", metavar="FILE.png", help="plot file (default ./<ID>.png, name made file-safe)")
    sp.add_argument("--no-plot", action="store_true", help="summary only")
    sp.add_argument("--json", action="store_true", help="print the part and its curves as JSON")
    sp.set_defaults(func=run, action=_show)

    sp = add("query", "parts ranked by effective capacitance at a bias (and temperature)",
             epilog=QUERY_RULES, formatter_class=argparse.RawDescriptionHelpFormatter)
    sp.add_argument("--bias", type=arg_type("V", "--bias"), required=True, metavar="V", help="DC bias, volts")
    sp.add_argument("--temp", type=arg_type("degC", "--temp"), default=25.0, metavar="DEGC",
                    help="temperature in degC (default 25, the reference temperature)")
    sp.add_argument("--temp-tol", type=arg_type("degC", "--temp-tol"), default=2.0, metavar="DEGC",
                    help="curves within this many degC of --temp count as measured at it (default 2)")
    sp.add_argument("--min", dest="min_C", type=arg_type("F", "--min", ceramic=True), metavar="C",
                    help="only parts giving at least this capacitance, e.g. 2.2u")
    sp.add_argument("--case", metavar="CODE", help="only this EIA case code, e.g. 0603")
    sp.add_argument("--class", dest="class_code", metavar="CODE", type=_class_code,
                    help="only this class code, e.g. X7R (any case)")
    sp.add_argument("--branch", choices=("rising", "falling"), help="only curves of this sweep branch")
    sp.add_argument("--origin", choices=("lot summary", "measured", "supplier claim"),
                    help="only curves of this origin")
    sp.add_argument("--limit", type=int, metavar="N", help="show the first N parts only")
    sp.add_argument("--json", action="store_true", help="print the answer as JSON")
    sp.set_defaults(func=run, action=_query)

    sp = add("remove", "remove a part (with its curves) or one curve")
    sp.add_argument("part_id", metavar="ID")
    sp.add_argument("--curve", type=int, metavar="N", help="remove only curve N of the part")
    sp.set_defaults(func=run, action=_remove)

    sp = add("export", "export a part's curves as csv, json, spice or touchstone")
    sp.add_argument("part_id", metavar="ID")
    from benchkit.exports import FORMATS

    sp.add_argument("--format", choices=FORMATS, required=True)
    sp.add_argument("--out", required=True, metavar="PATH",
                    help="a file (when one curve is exported) or a folder (one file per curve, "
                         "named from the part id made file-safe and the curve number)")
    sp.add_argument("--curve", type=int, metavar="N", help="only curve N of the part")
    sp.add_argument("--esr", type=arg_type("ohm", "--esr"), metavar="OHM",
                    help="series resistance for the SPICE model (default: the one stored with the curve)")
    sp.add_argument("--points", type=int, metavar="N", help="rows of the csv table (default 51)")
    sp.add_argument("--bias", type=arg_type("V", "--bias"), metavar="VOLTS",
                    help="bias of a wideband export (touchstone; csv or spice against frequency)")
    sp.add_argument("--fixture", choices=("one-port", "series-through", "shunt-through"),
                    help="Touchstone fixture: .s1p is one-port; .s2p needs series- or shunt-through")
    sp.add_argument("--touchstone-version", choices=("1", "2"), default="1")
    sp.set_defaults(func=run, action=_export)

    sp = add("impedance", "a part's impedance against frequency at a bias: ESR, |Z|, self-resonance; "
                          "--plot draws |Z| and ESR against frequency for several biases")
    sp.add_argument("part_id", metavar="ID")
    sp.add_argument("--bias", type=arg_type("V", "--bias"), metavar="VOLTS", required=True)
    sp.add_argument("--freq", type=arg_type("Hz", "--freq"), metavar="HZ",
                    help="also |Z|, phase, ESR and C at this frequency (e.g. 100k, 1M)")
    sp.add_argument("--plot", metavar="FILE.png", help="plot |Z| and ESR against frequency")
    sp.add_argument("--plot-biases", metavar="V,V,...",
                    help="biases of the plot (default: every fitted bias)")
    sp.add_argument("--json", action="store_true", help="print the answer as JSON")
    sp.set_defaults(func=run, action=_impedance)

    sp = add("import", "merge another library (file or URL) into this one (what is here already is not "
                       "added again; the order of merges does not matter)")
    sp.add_argument("other", metavar="OTHER.sqlite|URL")
    sp.set_defaults(func=run, action=_import)

    p.set_defaults(func=_no_action, parser=p)


def _no_action(args) -> int:
    args.parser.print_help(sys.stderr)
    return 2


def _remote_target(args) -> str | None:
    """The http(s):// URL of a `benchkit serve` when --library (or $BENCHKIT_LIBRARY) names one."""
    from benchkit.library.filing import is_http_url

    target = args.library if args.library is not None else os.environ.get("BENCHKIT_LIBRARY")
    return target if is_http_url(target) else None


def _add_remote(args, src: Path) -> int:
    """`library add RUN_DIR --library http://HOST:PORT`: the run filed through a server's write API."""
    from benchkit.commands.serve import TOKEN_ENV, read_token_file
    from benchkit.library.filing import file_run

    url = _remote_target(args)
    token = read_token_file(args.token_file, "--token-file") if args.token_file else os.environ.get(TOKEN_ENV)
    if not token:
        raise UserError(f"{url}: filing over HTTP needs the server's write token; give --token-file FILE "
                        f"or set ${TOKEN_ENV}")
    answer = file_run(url, token, src, part_id=args.part, all_parts=args.all_parts, model=args.model,
                      allow_incomplete=args.allow_incomplete)
    for run in answer["runs"]:
        if run["already_present"]:
            print(f"{src}: run (points sha256 {run['points_sha256'][:12]}) of part {run['part_id']} is already "
                  f"in {answer['library']}; nothing added")
            continue
        for c in run["curves"]:
            state = "added" if c["added"] else "already present"
            print(f"curve {c['id']} ({state}): part {run['part_id']}, sample {c['sample_id']}, "
                  f"{c['branch']}, model {c['model']}, {c['n_points']} points")
        print(f"{answer['library']}: {sum(c['added'] for c in run['curves'])} curves of part {run['part_id']} "
              f"added from {src} (over HTTP)")
    return 0


@contextmanager
def _open(args, create: bool):
    """The library, closed after use; a file this command created is removed again if it fails."""
    from benchkit.library import Library

    remote = _remote_target(args)
    if remote is not None:
        raise UserError(f"{remote}: a web server takes runs only ('library add RUN_DIR'); give the library's "
                        f"file or postgresql:// URL for this action")
    lib = Library(args.library, create=create)
    try:
        yield lib
    except BaseException:
        lib.close()
        if lib.created:
            lib.discard_new_file()
        raise
    lib.close()


def run(args) -> int:
    return args.action(args)


# -- actions ---------------------------------------------------------------------------------
def _add_parts(args) -> int:
    from benchkit.catalogue import PartsFileError, load_parts

    try:
        parts = load_parts(args.parts_file)
    except FileNotFoundError:
        raise UserError(f"{args.parts_file}: no such parts file") from None
    except PartsFileError as exc:
        raise UserError(str(exc)) from None
    with _open(args, create=True) as lib:
        counts = lib.add_parts(parts.values())
        print(f"{lib.where}: {counts['added']} parts added, {counts['updated']} updated, "
              f"{counts['unchanged']} unchanged")
    return 0


def _add(args) -> int:
    src = Path(args.source)
    remote = _remote_target(args) is not None
    if not src.exists():
        raise UserError(f"{src}: no such run directory or curve file")
    if remote and not src.is_dir():
        raise UserError(f"{src}: over HTTP a library takes run directories; file curve documents, claims and "
                        f"reports with the library's file or postgresql:// URL")
    if src.is_dir():
        if args.esr is not None:
            raise UserError("--esr is for curve documents; a run's own Rs/D readings give its ESR")
        if args.all_parts and args.part:
            raise UserError("give --part ID or --all-parts, not both")
        if remote:
            return _add_remote(args, src)
        from benchkit.library.ingest import add_run_parts

        with _open(args, create=True) as lib:
            for s in add_run_parts(lib, src, args.part, all_parts=args.all_parts, model=args.model,
                                   allow_incomplete=args.allow_incomplete):
                if s.already_present:
                    print(f"{src}: run (points sha256 {s.points_sha256[:12]}) of part {s.part_id} is already "
                          f"in {lib.where}; nothing added")
                    continue
                for fc in s.curves:
                    state = "added" if fc.added else "already present"
                    print(f"curve {fc.curve_id} ({state}): part {s.part_id}, sample {fc.sample_id}, "
                          f"{fc.branch}, model {fc.curve.model}, {fc.n_points} points")
                print(f"{lib.where}: {s.added} curves of part {s.part_id} added from {src}")
        return 0
    if src.suffix.lower() == ".csv":  # a supplier's claimed curve: filed as origin "supplier claim"
        from benchkit.verify.claims import load_claim

        curve = load_claim(src).to_curve()
    else:
        from benchkit.library.fitsbridge import curve_from_json

        try:
            text = src.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise UserError(f"{src}: unreadable ({exc})") from None
        if '"benchkit-verification"' in text:
            return _add_verdict(args, src, text)
        curve = curve_from_json(text, str(src))
    with _open(args, create=True) as lib:
        cid, added = lib.add_curve(curve, args.part, esr_ohm=args.esr, where=str(src))
        print(f"curve {cid} {'added' if added else 'already present'} in {lib.where}")
    return 0


def _add_verdict(args, src: Path, text: str) -> int:
    doc = loads_json(text, str(src), "verification report")
    with _open(args, create=True) as lib:
        vid, added = lib.add_verdict(doc, where=str(src))
        print(f"verification report {vid} {'added' if added else 'already present'} in {lib.where}")
    return 0


def _list(args) -> int:
    with _open(args, create=False) as lib:
        parts = lib.parts(case=args.case, class_code=args.class_code)
        counts: dict[str, int] = {}
        for rec in lib.curves():
            counts[rec.part_id] = counts.get(rec.part_id, 0) + 1
        if args.json:
            print(json.dumps([{**p.as_dict(), "n_curves": counts.get(p.part_id, 0)} for p in parts],
                             indent=2))
            return 0
        if not parts:
            print(f"{lib.where}: no parts")
            return 0
        print(f"{'part':<16} {'nominal':>9} {'rated':>7} {'class':<5} {'case':<5} {'curves':>6}  description")
        for p in parts:
            nominal = format_value(p.nominal_C_F, "F") if p.nominal_C_F else "?"
            rated = format_value(p.rated_V, "V") if p.rated_V else "?"
            print(f"{p.part_id:<16} {nominal:>9} {rated:>7} {p.class_code or '':<5} {p.case or '':<5} "
                  f"{counts.get(p.part_id, 0):>6}  {p.description}")
    return 0


def _show(args) -> int:
    from benchkit.exports.paths import safe_stem
    from benchkit.library.plot import plot_part

    with _open(args, create=False) as lib:
        part = lib.part(args.part_id)
        records = lib.curves(part.part_id)
        target = None
        if not args.no_plot:
            target = Path(args.plot) if args.plot else Path.cwd() / f"{safe_stem(part.part_id)}.png"
            plot_part(part, records, target)
        if args.json:
            print(json.dumps({"part": part.as_dict(), "curves": [_curve_summary(r) for r in records],
                              "plot": str(target) if target else None}, indent=2))
            return 0
        print(f"part {part.part_id}: {part.description}")
        for name, value in (("nominal", format_value(part.nominal_C_F, "F") if part.nominal_C_F else None),
                            ("tolerance", part.tolerance), ("rated", format_value(part.rated_V, "V")
                                                            if part.rated_V else None),
                            ("class", part.class_code), ("case", part.case), ("supplier", part.supplier)):
            print(f"  {name:<10} {value if value is not None else '?'}")
        if not records:
            print("  no curves")
        for rec in records:
            c = rec.curve
            lo, hi = rec.valid_range_V
            stats = getattr(c, "stats", None) or {}
            r2 = stats.get("r2")
            print(f"  curve {rec.curve_id}: {rec.origin}, sample {rec.sample_id or '-'}, {rec.branch or '-'}, "
                  f"{rec.temp_C:.1f} degC, model {rec.model}, {lo:g}..{hi:g} V, "
                  f"C({lo:g} V) = {format_value(float(c.C(lo)), 'F')}, C({hi:g} V) = "
                  f"{format_value(float(c.C(hi)), 'F')}" + (f", r2 {r2:.5f}" if isinstance(r2, float) else ""))
        if target is not None:
            print(f"plot: {target}")
    return 0


def _curve_summary(rec) -> dict:
    """One stored curve as plain data: what `library show` prints, with SI units in the names."""
    c = rec.curve
    lo, hi = rec.valid_range_V
    stats = getattr(c, "stats", None) or {}
    return {"curve_id": rec.curve_id, "origin": rec.origin, "sample_id": rec.sample_id,
            "branch": rec.branch, "temp_C": rec.temp_C, "model": rec.model,
            "valid_range_V": [lo, hi], "C_at_low_F": float(c.C(lo)), "C_at_high_F": float(c.C(hi)),
            "r2": stats.get("r2") if isinstance(stats.get("r2"), float) else None,
            "esr_ohm": rec.esr_ohm, "run_path": rec.run_path}


def _query(args) -> int:
    with _open(args, create=False) as lib:
        results = lib.query(args.bias, args.temp, min_C_F=args.min_C, case=args.case, class_code=args.class_code,
                            branch=args.branch, origin=args.origin, temp_tol_C=args.temp_tol, limit=args.limit)
    if args.json:
        print(json.dumps([{"part_id": r.part_id, "covered": r.covered, "C_F": r.C_F, "u_C_F": r.u_C_F,
                           "origin": r.origin, "n_curves": r.n_curves, "curve_ids": list(r.curve_ids),
                           "temps_C": list(r.temps_C), "reason": r.reason} for r in results], indent=2))
        return 0
    head = f"C at {args.bias:g} V, {args.temp:g} degC"
    covered = [r for r in results if r.covered]
    print(f"{'rank':>4}  {'part':<16} {head:>24} {'u(C)':>10} {'C/nominal':>10}  {'origin':<14} curves")
    for i, r in enumerate(covered, start=1):
        u = format_value(r.u_C_F, "F") if r.u_C_F is not None else "n/a"
        pct = f"{r.retained_pct:.1f} %" if r.retained_pct is not None else "?"
        print(f"{i:>4}  {r.part_id:<16} {format_value(r.C_F, 'F'):>24} {u:>10} {pct:>10}  {r.origin:<14} "
              f"{r.n_curves}")
    rest = [r for r in results if not r.covered]
    if rest:
        print("not covered:")
        for r in rest:
            print(f"      {r.part_id:<16} {r.reason}")
    if not results:
        print("no parts match")
    return 0


def _remove(args) -> int:
    with _open(args, create=False) as lib:
        if args.curve is not None:
            rec = lib.curve(args.curve)
            if rec.part_id != args.part_id:
                raise UserError(f"curve {args.curve} belongs to part {rec.part_id!r}, not {args.part_id!r}; "
                                f"nothing removed")
            lib.remove_curve(args.curve)
            print(f"curve {args.curve} of part {args.part_id} removed")
        else:
            n = lib.remove_part(args.part_id)
            print(f"part {args.part_id} removed with {n} curves")
    return 0


def _export(args) -> int:
    from benchkit.atomic import write_text_atomic
    from benchkit.exports import SUFFIX, render
    from benchkit.exports.paths import inside, safe_stem

    with _open(args, create=False) as lib:
        part = lib.part(args.part_id)
        records = lib.curves(part.part_id)
        if args.curve is not None:
            records = [r for r in records if r.curve_id == args.curve]
            if not records:
                raise UserError(f"part {part.part_id!r} has no curve {args.curve}; see 'benchkit library show ID'")
        if not records:
            raise UserError(f"part {part.part_id!r} has no curves to export")
        out = Path(args.out)
        as_file = len(records) == 1 and not out.is_dir() and out.suffix != ""
        if not as_file and out.exists() and not out.is_dir():
            raise UserError(f"--out {out}: several curves need a folder, and this is a file")
        # render everything before writing anything: a bad curve leaves no partial set of files
        jobs = []
        bias = getattr(args, "bias", None)
        if bias is not None and args.curve is None:  # a wideband export: the curves that have one
            records = [r for r in records if r.curve.wideband is not None] or records[:1]
        for rec in records:
            sfx = SUFFIX[args.format]
            if args.format == "touchstone":
                from benchkit.exports.touchstone import suffix
                sfx = suffix(getattr(args, "fixture", None) or "one-port", args.touchstone_version)
            target = out if as_file or len(records) == 1 and out.suffix else inside(
                out, f"{safe_stem(part.part_id)}_c{rec.curve_id}{sfx}")
            jobs.append((rec, target))
        texts = [render(rec.curve, args.format, esr_ohm=args.esr if args.esr is not None else rec.esr_ohm,
                        n_points=args.points, name=part.part_id,
                        source_note=f"library {lib.where} curve {rec.curve_id}; run {rec.run_path or '-'}",
                        bias_V=getattr(args, "bias", None), fixture=getattr(args, "fixture", None),
                        touchstone_version=getattr(args, "touchstone_version", "1"),
                        out_suffix=target.suffix if args.format == "touchstone" else None)
                 for rec, target in jobs]
        for (rec, target), text in zip(jobs, texts):
            write_text_atomic(target, text)
            print(f"curve {rec.curve_id} -> {target}")
    return 0


def _impedance(args) -> int:
    from benchkit.library.impedance import answer, plot_impedance, wideband_record
    from benchkit.units import parse_value

    with _open(args, create=False) as lib:
        part = lib.part(args.part_id)
        rec = wideband_record(lib.curves(part.part_id))
    a = answer(rec.curve, args.bias, args.freq)
    if args.json:
        print(json.dumps(a, indent=2))
    else:
        print(f"part {part.part_id} curve {rec.curve_id} at {a['bias_V']:g} V"
              + (" (interpolated between fitted biases)" if a["interpolated"] else ""))
        print(f"  self-resonant frequency {format_value(a['srf_Hz'], 'Hz')} "
              f"(u {format_value(a['u_srf_Hz'], 'Hz')})")
        print(f"  ESL {format_value(a['esl_H'], 'H')}, ESR floor {format_value(a['esr_floor_ohm'], 'ohm')}")
        if args.freq is not None:
            print(f"  at {format_value(a['freq_Hz'], 'Hz')}: |Z| {format_value(a['Z_abs_ohm'], 'ohm')} "
                  f"(u {format_value(a['u_Z_abs_ohm'], 'ohm')}), phase {a['theta_deg']:.2f} deg, "
                  f"ESR {format_value(a['esr_ohm'], 'ohm')} (u {format_value(a['u_esr_ohm'], 'ohm')})")
    if args.plot:
        if args.plot_biases:
            biases = [parse_value(x.strip(), "V", "--plot-biases") for x in args.plot_biases.split(",")]
        else:
            biases = rec.curve.wideband.biases_V
        target = plot_impedance(rec.curve, biases, args.plot, title=f"{part.part_id}: Z(f) at each bias")
        print(f"plot -> {target}")
    return 0


def _import(args) -> int:
    with _open(args, create=True) as lib:
        s = lib.import_library(args.other)
        print(f"{lib.where}: from {args.other}: {s.parts_added} parts, {s.runs_added} runs, "
              f"{s.curves_added} curves added; {s.curves_present} curves were already here"
              + (f"; {s.verdicts_added} verification reports added" if s.verdicts_added else "")
              + (f"; {s.parts_kept} parts differ there and were kept as here (changed later here)"
                 if s.parts_kept else "")
              + (f"; {s.parts_updated} parts taken from there (changed later there)" if s.parts_updated else ""))
    return 0
