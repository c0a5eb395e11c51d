"""The readable table of a benchmark run (printed and saved as bench.txt)."""

from __future__ import annotations


def _f(v, fmt: str, none: str = "-") -> str:
    return none if v is None else format(v, fmt)


def format_table(results: dict) -> str:
    m, g = results["machine"], results["git"]
    lines = [
        f"benchkit benchmarks {results['date_utc']}" + ("  (--quick)" if results.get("quick") else ""),
        f"commit {g.get('commit') or 'unknown'}{' (uncommitted changes)' if g.get('dirty') else ''}",
        f"machine {m['platform']}, {m['cpu_count']} CPUs, Python {m['python']}",
        "",
    ]
    b = results["benchmarks"]
    bt = b.get("bench_time")
    if bt is not None:
        lines.append("Bench time: uniform (0.5 V steps, fixed 5 s dwell) vs settle detection + adaptive steps")
        if "error" in bt:
            lines.append(f"  FAILED: {bt['error']}")
        else:
            t = bt["target"]
            lines.append(f"  target: ratio <= {t['max_bench_time_ratio']:g}, adaptive max error <= "
                         f"{t['max_error_pct_of_C0']:g} % of C0 (vs the true settled curve, both branches), "
                         f"at every noise seed {bt['settings'].get('seeds', [0])}")
            head = (f"  {'part':8} {'top V':>5} | {'uniform s':>9} {'pts':>4} {'err %C0':>7} | "
                    f"{'adaptive s':>10} {'pts':>4} {'pass':>4} {'err %C0':>7} {'band':>5} | "
                    f"{'ratio':>5} {'worst':>5} {'err':>5}  time/err  stop (seed 0)")
            lines += [head, "  " + "-" * (len(head) - 2)]
            for pid, r in bt["parts"].items():
                u, a = r["uniform"], r["adaptive"]
                band = max((v for v in (a.get("band_pct_of_C0") or {}).values() if v is not None),
                           default=None)
                ok = ("yes" if r["meets_time_target"] else "no") + "/" + \
                     ("yes" if r["meets_error_target"] else "no")
                lines.append(
                    f"  {pid:8} {r['top_V']:5g} | {u['bench_s']:9.0f} {u['points']:4d} "
                    f"{u['max_error_pct_of_C0']:7.3f} | {a['bench_s']:10.0f} {a['points']:4d} "
                    f"{a.get('passes', 0):4d} {a['max_error_pct_of_C0']:7.3f} {_f(band, '5.2f')} | "
                    f"{r['bench_time_ratio']:5.2f} {_f(r.get('worst_bench_time_ratio'), '5.2f')} "
                    f"{_f(r.get('worst_max_error_pct_of_C0'), '5.3f')}  {ok:8}  {a.get('stop_reason')}"
                    + (f"; {a['max_dwell_points']} point(s) at max dwell" if a.get("max_dwell_points") else ""))
            tot = bt["total"]
            lines.append(f"  all parts: uniform {tot['uniform_bench_s']:.0f} s, adaptive "
                         f"{tot['adaptive_bench_s']:.0f} s, ratio {_f(tot['bench_time_ratio'], '.2f')}")
            zs = {pid: r["seeds"].get("points_rms_z") for pid, r in bt["parts"].items()}
            if any(zs.values()):
                lines.append("  recorded points against the true settled value, rms of (C - truth)/u "
                             "(about 1 when u is honest), adaptive at each seed: "
                             + "; ".join(f"{pid} " + " ".join(_f(x, '.2f') for x in v)
                                         for pid, v in zs.items() if v))
            lines.append("  (err: max |fit - truth| over the fit's range, worse branch; band: adaptive "
                         "k=2 band incl. prediction check at stop, % of C0; seed 0, then the worst "
                         "ratio and err over the seeds, which the targets judge)")
        lines.append("")
    ov = b.get("overhead")
    if ov is not None:
        lines.append("Software overhead per measured point (virtual clock: no dwell), like with like")
        if "error" in ov:
            lines.append(f"  FAILED: {ov['error']}")
        else:
            lines.append(f"  engine, {ov['points']} points of {ov['exchanges_per_point']:.0f} exchanges "
                         f"(median of {ov['rounds']} rounds): {ov['engine_point_wall_s'] * 1e3:.2f} ms")
            lines.append(f"  the same exchanges bare through pyvisa + one fsync'd row: "
                         f"{ov['bare_point_wall_s'] * 1e3:.2f} ms; engine/bare "
                         f"{ov['engine_over_bare']:.2f} (target <= {ov['target_engine_over_bare']:g})")
            if ov.get("pymeasure_point_wall_s") is not None:
                lines.append(f"  the same exchanges as a PyMeasure procedure, fsync per row: "
                             f"{ov['pymeasure_point_wall_s'] * 1e3:.2f} ms; engine/PyMeasure "
                             f"{ov['engine_over_pymeasure']:.2f} (target < 1)")
            else:
                lines.append(f"  PyMeasure: skipped ({ov.get('pymeasure_skipped')})")
        lines.append("")
    fl = b.get("floor")
    if fl is not None:
        lines.append("Uniform sweep on a real clock against its physics floor")
        if "error" in fl:
            lines.append(f"  FAILED: {fl['error']}")
        else:
            lines.append(f"  {fl['part']}, {fl['points']} points, dwell {fl['dwell_s']:g} s: "
                         f"{fl['wall_s']:.3f} s wall against {fl['physics_floor_s']:.3f} s of "
                         f"dwell, ramp and measurement time: {fl['over_floor_pct']:+.2f} % "
                         f"(target <= {fl['target_pct']:g} %)")
        lines.append("")
    fs = b.get("fits")
    if fs is not None:
        lines.append("Fits per second, 41-point sweep: fits.fit_sweep vs bare scipy.optimize.curve_fit")
        if "error" in fs:
            lines.append(f"  FAILED: {fs['error']}")
        else:
            lines.append(f"  {'model':8} {'fit_sweep/s':>12} {'curve_fit/s':>12} {'ratio':>7}")
            for name, r in fs["models"].items():
                lines.append(f"  {name:8} {r['fit_sweep_per_s']:12.1f} {r['curve_fit_per_s']:12.1f} "
                             f"{r['curve_fit_over_fit_sweep']:7.1f}")
            lines.append(f"  auto (every family, leave-one-out choice): "
                         f"{fs['auto_ms_per_sweep']:.1f} ms CPU per sweep (wall clock "
                         f"{1e3 / fs['auto_fit_sweep_per_s']:.1f} ms; target "
                         f"{fs['auto_target_ms']:g} ms: {'met' if fs['auto_within_target'] else 'NOT met'})")
        lines.append("")
    sd = b.get("strd")
    if sd is not None:
        lines.append("NIST StRD nonlinear regression: matched digits (LRE) of fits.solver, params / RSS")
        if "error" in sd:
            lines.append(f"  FAILED: {sd['error']}")
        else:
            from benchkit.benchmarks.strd import format_rows

            lines += format_rows(sd["datasets"])
            lines.append(f"  every dataset >= {sd['min_lre_required']:g} digits from a certified "
                         f"start: {'yes' if sd['all_ok'] else 'NO'}")
        lines.append("")
    it = b.get("independent_truths")
    if it is not None:
        lines.append("Independent truths (shapes none of the models is), auto fits")
        if "error" in it:
            lines.append(f"  FAILED: {it['error']}")
        else:
            lines.append(f"  {it['n_per_branch']} points per branch, {100 * it['noise_frac']:g} % noise, "
                         f"{it['seeds']} seeds, both branches")
            for fam, r in it["families"].items():
                lines.append(f"  {fam:<14} worst {r['worst_err_pct_C0']:6.3f} % of C0, band covers "
                             f">= {100 * r['min_coverage']:5.1f} %, lack of fit said "
                             f"{r['said_lack_of_fit']}/{r['fits']}, models {r['models']}")
        lines.append("")
    lq = b.get("library_query")
    if lq is not None:
        lines.append("Library query")
        if "error" in lq:
            lines.append(f"  FAILED: {lq['error']}")
        else:
            lines.append(f"  {lq['n_curves']} curves ({lq['n_parts']} parts) at {lq['bias_V']:g} V, "
                         f"{lq['temp_C']:g} degC; target 200 ms cold and warm")
            for name in lq.get("backends", []):
                r = lq[name]
                lines.append(f"  {name:10} {r['query_warm_s'] * 1e3:7.1f} ms warm {r['query_cold_s'] * 1e3:7.1f} ms "
                             f"cold (worst of 3 fresh opens); build {r['build_s']:.1f} s")
            if lq.get("cold_means"):
                lines.append(f"  cold: {lq['cold_means']}")
                lines.append(f"  warm: {lq['warm_means']}")
            if "postgresql" not in lq.get("backends", []):
                lines.append("  postgresql not measured (BENCHKIT_BENCH_POSTGRES not set)")
            lines.append(f"  per-curve loop {lq['loop_s']:.2f} s ({lq['loop_over_query']:.0f}x the warm "
                         f"SQLite query); same answer on every backend: {lq['same_answer_on_both']}")
        lines.append("")
    sk = b.get("soak")
    if sk is not None:
        lines.append("Soak: peak memory of a long sweep over a short one, and of their resumes "
                     "(fresh processes)")
        if "error" in sk:
            lines.append(f"  FAILED: {sk['error']}")
        else:
            for what, a, b, ratio in (("sweep", sk["short"], sk["long"], sk["peak_ratio"]),
                                      ("resume", sk["short_resume"], sk["long_resume"],
                                       sk["resume_peak_ratio"])):
                lines.append(f"  {what:6} {sk['short_resume']['points']} points: peak RSS "
                             f"{a['peak_rss_bytes'] / 1e6:.1f} MB ({a['wall_s']:.0f} s); "
                             f"{sk['long_resume']['points']} points: {b['peak_rss_bytes'] / 1e6:.1f} MB "
                             f"({b['wall_s']:.0f} s); ratio {ratio:.3f}")
            lines.append(f"  target <= {sk['target_ratio']:g} for both: "
                         f"{'met' if sk['within_target'] else 'NOT met'}; "
                         f"{sk['extra_bytes_per_point']:.1f} extra bytes per point in the sweep")
        lines.append("")
    return "\n".join(lines)
