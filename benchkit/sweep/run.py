"""Starting and resuming a run, and the shutdown that every way out passes.

Whatever ends the run (an error, SIGINT, SIGTERM), the `finally` ramps down and switches the
output off (BiasSupply.safe_off), and run.json records how the run ended. A resumed run
writes each planned point exactly once.

Faults: the drivers retry, resynchronise and reconnect (bounded, with backoff) and re-apply
their settings; the engine records each recovery (event link_recovered, flag `retried` on the
point). It stops, bias off first, when a driver gives up, when the supply comes back from a
reconnect with its output off (it restarted), when an instrument reports an error (read after
each setting and at the end of each sample), or when points.csv or run.json cannot be written.
"""

from __future__ import annotations

import contextlib
import sys
import uuid
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Mapping

from benchkit import __version__
from benchkit.catalogue import catalogue_dict, load_catalogue
from benchkit.errors import EXIT_FAILED, EXIT_OK, UserError
from benchkit.sweep.benchfile import BenchFile, bench_from_dict
from benchkit.sweep.engine import SweepEngine
from benchkit.sweep.plan import Plan, build_sweeps, discharge_wait_s, parse_plan, resolve_samples
from benchkit.sweep.progress import Progress
from benchkit.sweep.limits import bench_ranges, check_above_rated_consent, check_bench_limits
from benchkit.sweep.resume import (
    check_against_record, check_prefix, replay_adaptive, resume_catalogue, samples_from_meta,
)
from benchkit.sweep.summary import final_state_line, sample_lines, summary_record, supply_final_state
from benchkit.sweep.readings import capability_record
from benchkit.sweep.runlog import FLAGS, RunFileError, RunLog, utc_now
from benchkit.sweep.safety import Interrupted, SignalGuard, arm_last_resort, disarm_last_resort
from benchkit.sweep.sources import BenchSource
from benchkit.sweep.temperature import chamber_shutdown, check_chamber, first_visits, per_sample


@dataclass(frozen=True)
class RunResult:
    run_dir: Path
    run_id: str
    status: str  # complete | aborted
    reason: str | None
    n_points: int  # rows now in points.csv
    n_new: int  # rows written in this session
    n_planned: int
    points_sha256: str | None
    supply_safe: bool  # safe_off confirmed 0 V and output off

    @property
    def exit_code(self) -> int:
        return EXIT_OK if self.status == "complete" else EXIT_FAILED


def run_sweep(
    bench_or_instruments: Any,
    plan: Plan,
    out_dir: str | Path,
    clock: Any = None,
    progress: Progress | None = None,
    *,
    parts: Mapping[str, Any] | None = None,
    handle_signals: bool = True,
    io_timeout_s: float | None = None,
    extra_record: Mapping[str, Any] | None = None,
    before_output: Callable[[], None] | None = None,
    confirm_above_rated: bool | Callable[[list[str]], bool] = False,
) -> RunResult:
    """Run `plan` on a bench into the new directory `out_dir`.

    `bench_or_instruments`: a bench-file path or BenchFile, a started SimBench (its clock is
    used unless `clock` is given), or open `Instruments`. Everything is validated before any
    voltage is applied, and before the run directory is made (UserError): the plan's limits
    against the bench's own ranges too. A plan that goes above a part's rating needs
    `confirm_above_rated` (True for --yes, or a callable shown the summary lines that asks
    the operator). `before_output` is called once the instruments answered and the run
    directory exists, just before the supply is touched (e.g. to print cautions).
    Returns how the run ended; the supply is off either way.
    """
    parts = load_catalogue() if parts is None else parts
    src = BenchSource(bench_or_instruments, io_timeout_s)
    clock = _pick_clock(clock, src)
    samples = resolve_samples(plan, src.channels)
    sweeps = build_sweeps(plan, samples, parts, src.supply_range_V())
    wait_s, wait_how = discharge_wait_s(plan, sweeps)
    check_bench_limits(plan, sweeps, bench_ranges(src))
    above, consent = _consent(plan, sweeps, confirm_above_rated)
    with src.open() as inst:
        check_chamber(plan, inst)
        meta = _new_meta(plan, sweeps, inst, src, clock, wait_s, wait_how, extra_record)
        meta["above_rated"] = {"allowed": plan.limits["allow_above_rated"], "samples": above,
                               "confirmed_by": consent}
        meta["summary"] = summary_record(plan, sweeps, above)
        log = RunLog.create(out_dir, meta)
        try:  # the run directory's lock and row-sync thread are let go however the run ends
            log.flag_samples = {sid: ("above_rated",) for sid in above}
            log.event(0.0, "start", points_planned=meta["n_points_planned"])
            log.save()
            _say_summary(progress, plan, sweeps, above)
            if before_output is not None:
                before_output()
            return _execute(inst, sweeps, plan, log, clock, progress, handle_signals, src, [],
                            wait_s)
        finally:
            log.close()


def resume_sweep(
    run_dir: str | Path,
    bench_or_instruments: Any,
    clock: Any = None,
    progress: Progress | None = None,
    *,
    plan: Plan | None = None,
    parts: Mapping[str, Any] | None = None,
    handle_signals: bool = True,
    io_timeout_s: float | None = None,
    before_output: Callable[[], None] | None = None,
    confirm_above_rated: bool | Callable[[list[str]], bool] = False,
) -> RunResult:
    """Continue an interrupted run from its last complete point (also after kill -9).

    Nothing in the run directory is believed that can be checked: the rows must match their
    digests (points.chain), the stored plan its hash, and every limit is derived again from
    the catalogue (`parts`, default: the parts file the run recorded) and the plan, then
    compared with run.json: any disagreement is refused (UserError). `plan`, when given, must
    be the same plan (same hash). Points already in points.csv are not measured again.
    """
    log = RunLog.reopen(run_dir)
    try:
        meta = log.meta
        if meta.get("status") == "complete":
            raise UserError(f"{run_dir}: run {meta.get('run_id')} is already complete; nothing to resume")
        stored = parse_plan(meta.get("plan"), f"{Path(run_dir) / 'run.json'} plan")
        if stored.sha256 != meta.get("plan_sha256"):
            raise UserError(f"{run_dir}/run.json: the stored plan does not match its plan_sha256; the file was edited")
        if plan is not None and plan.sha256 != stored.sha256:
            raise UserError(f"{plan.source}: not the plan of run {meta['run_id']} (plan hash differs); resume without --plan or with the same plan")
        samples, recorded_parts = samples_from_meta(meta, run_dir)
        parts = resume_catalogue(meta, run_dir) if parts is None else parts
        src = BenchSource(bench_or_instruments, io_timeout_s)
        if src.bench is not None and src.channels:
            bench_map = {c.channel: (c.sample_id, c.part_id) for c in src.channels}
            for s in samples:
                if bench_map.get(s.channel, (s.sample_id, s.part_id)) != (s.sample_id, s.part_id):
                    raise UserError(
                        f"{src.bench.source}: channel {s.channel} holds {bench_map[s.channel][0]}, but run "
                        f"{meta['run_id']} measured {s.sample_id} there; use the bench of the run"
                    )
        clock = _pick_clock(clock, src)
        sweeps = build_sweeps(stored, samples, parts, src.supply_range_V())
        check_bench_limits(stored, sweeps, bench_ranges(src))
        wait_s, _ = discharge_wait_s(stored, sweeps)
        above, consent = _consent(stored, sweeps, confirm_above_rated)
        check_against_record(meta, run_dir, per_sample(sweeps), recorded_parts, wait_s, above)
        sweeps = [replay_adaptive(sw, log.rows) if sw.adaptive is not None else sw for sw in sweeps]
        check_prefix(log.rows, sweeps, meta["run_id"], run_dir)
        log.flag_samples = {sid: ("above_rated",) for sid in above}
        with src.open() as inst:
            check_chamber(stored, inst)
            # the session's clock and instruments go into the event; the top level keeps the first
            log.event(None, "resume", points_done=len(log.rows), instruments=inst.record(),
                      clock="virtual" if getattr(clock, "virtual", False) else "real",
                      above_rated_confirmed_by=consent)
            try:
                log.set_status("running")
            except RunFileError as exc:  # e.g. the disk is still full: nothing was energised
                raise UserError(f"{exc}; the run was not resumed, nothing was measured") from None
            _say_summary(progress, stored, sweeps, above)
            if before_output is not None:
                before_output()
            return _execute(inst, sweeps, stored, log, clock, progress, handle_signals, src, log.rows, wait_s)
    finally:
        log.close()


def stored_bench(meta: Mapping) -> BenchFile:
    """The bench a run used, from its run.json (for resuming a run on a bench file)."""
    rec = meta.get("bench") or {}
    if rec.get("kind") != "file":
        raise UserError("run.json: this run did not use a bench file; resume it the way it ran (--sim)")
    return bench_from_dict(rec, f"run.json bench ({rec.get('source')})")


# --------------------------------------------------------------------------- internals


def _consent(plan, sweeps, confirm) -> tuple[list[str], str | None]:
    """The samples above rating and who agreed: '--yes', 'terminal' or None (none above)."""
    from benchkit.sweep.limits import above_rated

    over = [sw.sample.sample_id for sw, _ in above_rated(sweeps)]
    if not over:
        return [], None
    if callable(confirm):
        ok = bool(confirm(sample_lines(plan, sweeps, over)))
        how = "terminal"
    else:
        ok, how = bool(confirm), "--yes"
    check_above_rated_consent(plan, sweeps, ok)
    return over, how


def _say_summary(progress, plan, sweeps, above) -> None:
    """Before energising: one line per sample (highest bias, current limit, ramp, duration)."""
    if progress is None:
        return
    for line in sample_lines(plan, sweeps, above):
        progress.note(f"benchkit: {line}")


def _pick_clock(clock, src: BenchSource):
    if clock is not None:
        return clock
    if src.sim is not None and getattr(src.sim, "clock", None) is not None:
        return src.sim.clock
    from instruments.clock import RealClock

    return RealClock()


def _new_run_id() -> str:
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return f"run-{stamp}-{uuid.uuid4().hex[:6]}"


def _new_meta(plan, sweeps, inst, src, clock, wait_s, wait_how, extra) -> dict:
    conds = {(sw.conditions.function, sw.conditions.freq_Hz, sw.conditions.ac_level_Vrms, sw.conditions.source) for sw in sweeps}
    if len(conds) == 1:
        f, fr, lv, so = conds.pop()
        top = {"function": f, "freq_Hz": fr, "ac_level_Vrms": lv, "conditions_source": so}
    else:
        top = {"function": None, "freq_Hz": None, "ac_level_Vrms": None,
               "conditions_source": "per sample: see samples[].conditions (parts of different class or value)"}
    meta = {
        "format": "benchkit-run",
        "version": 1,
        "run_id": _new_run_id(),
        "software_version": __version__,
        "status": "running",
        "reason": None,
        "start_utc": utc_now(),
        "end_utc": None,
        "clock": "virtual" if getattr(clock, "virtual", False) else "real",
        "plan": plan.to_dict(),
        "plan_sha256": plan.sha256,
        "plan_source": plan.source,
        "instruments": inst.record(),
        "bias_source": "meter" if hasattr(inst.supply, "meter") else "supply",
        "meter_capabilities": capability_record(inst.meter, hasattr(inst.supply, "meter")),
        "bench": src.record(),
        "samples": [
            {
                "sample_id": sw.sample.sample_id,
                "part_id": sw.sample.part_id,
                "channel": sw.sample.channel,
                "hours_since_heat_h": sw.sample.hours_since_heat_h,
                "part": catalogue_dict(sw.part),
                "conditions": {
                    "function": sw.conditions.function,
                    "freq_Hz": sw.conditions.freq_Hz,
                    "ac_level_Vrms": sw.conditions.ac_level_Vrms,
                    "conditions_source": sw.conditions.source,
                },
                "n_points": sum(len(w.points) for w in sweeps if w.sample is sw.sample),
            }
            for sw in first_visits(sweeps)  # each sample once, also when visited at several temperatures
        ],
        "conditions": top,
        "n_points_planned": sum(len(sw.points) for sw in sweeps),
        "discharge_wait_s": wait_s,
        "discharge_wait_source": wait_how,
        "flags_vocabulary": dict(FLAGS),
        "points_file": "points.csv",
        "points_sha256": None,
        "events": [],
    }
    if extra:
        meta.update(extra)
    return meta


class _NoGuard:
    """Stand-in when signals are not ours to handle (not the main thread, or asked not to)."""

    pending = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def transaction(self):
        return contextlib.nullcontext()

    def check(self):
        pass

    def stopping(self):
        pass

    def window_sleep(self, sleep, seconds):
        sleep(seconds)


def _is_expected(exc: BaseException) -> bool:
    """Stops the engine reports as an aborted run rather than as a bug."""
    from instruments.drivers.errors import InstrumentError, InvalidValueError

    return isinstance(exc, (Interrupted, KeyboardInterrupt, InstrumentError, InvalidValueError,
                            RunFileError))


def _reason(exc: BaseException, where: str) -> str:
    if isinstance(exc, Interrupted):
        return f"{exc}; {where}"
    if isinstance(exc, KeyboardInterrupt):
        return f"KeyboardInterrupt; {where}"
    text = " ".join(str(exc).split()) or "(no message)"
    return f"{type(exc).__name__}: {text}; {where}"


def _execute(inst, sweeps, plan, log, clock, progress, handle_signals, src, done_rows, wait_s) -> RunResult:
    guard = SignalGuard() if handle_signals else _NoGuard()
    engine = SweepEngine(inst, sweeps, plan, log, clock, progress, guard, done_rows)
    raw_supply = inst.supply
    rate = plan.max_ramp_V_per_s
    token = arm_last_resort(lambda: raw_supply.safe_off(clock=clock, max_rate_V_per_s=rate))
    status, reason, error = "aborted", None, None
    safe = False
    with guard:
        try:
            engine.run()
            engine.finish(wait_s)
            status = "complete"
        except BaseException as exc:  # every way out passes the shutdown below
            if engine.output_off_done and isinstance(exc, (Interrupted, KeyboardInterrupt)):
                status = "complete"  # every point is saved and the output is off already
                log.event(engine.t_s(), "discharge_wait_interrupted", signal=str(exc))
            else:
                reason = _reason(exc, engine.where())
                error = None if _is_expected(exc) else exc
        finally:
            guard.stopping()
            safe = bool(raw_supply.safe_off(clock=clock, max_rate_V_per_s=rate))
            with contextlib.suppress(Exception):
                inst.scanner.open_all()
            disarm_last_resort(token)
            t = engine.t_s()
            state = supply_final_state(raw_supply) if safe else {
                "output_on": None, "voltage_set_V": None, "voltage_meas_V": None,
                "error": getattr(raw_supply, "last_safe_off_error", None) or "safe_off not confirmed"}
            log.event(t, "supply_final_state", **state)
            if progress is not None:
                progress.note(f"benchkit: {final_state_line(state)}")
            # then the chamber to the plan's safe temperature (a plan with a temperature list)
            chamber_ok = chamber_shutdown(getattr(inst, "chamber", None) if plan.data.get("temperature")
                                          else None, plan, log, t)
            if chamber_ok is False:
                print(f"benchkit: WARNING: {log.meta['events'][-1].get('detail')}", file=sys.stderr)
            if status == "complete":
                log.event(t, "complete", points_new=engine.n_new)
            else:
                log.event(t, "abort", reason=reason, points_new=engine.n_new,
                          caution=f"parts may still hold charge: wait {wait_s:g} s and check before handling")
                if progress is not None:
                    state = ("the bias supply is at 0 V with its output off (read back); " if safe
                             else "")
                    progress.note(f"benchkit: {state}parts may still hold charge; wait {wait_s:g} s "
                                  "and check before handling")
            if not safe:
                why = getattr(raw_supply, "last_safe_off_error", None) or "safe_off could not confirm 0 V and output off"
                log.event(t, "supply_not_confirmed_safe",
                          detail=f"{why}; the output may still be live: check the supply by hand")
                print(f"benchkit: WARNING: {why}; the supply's output may still be live: switch it off "
                      "by hand and check the fixture before touching it", file=sys.stderr)
            if src.sim is not None and hasattr(src.sim, "supply_state"):
                with contextlib.suppress(Exception):
                    log.meta["sim_final_supply_state"] = dict(src.sim.supply_state())
                    if chamber_ok is not None:
                        log.meta["sim_final_chamber_state"] = dict(src.sim.chamber_state())
            try:
                log.set_status(status, reason)
            except RunFileError as exc:  # the bias is off already; say what is not on disk
                print(f"benchkit: WARNING: the run ended {status} but run.json could not be "
                      f"updated: {exc}", file=sys.stderr)
            if progress is not None:
                progress.finish(status)
    if error is not None:
        raise error
    n_rows = len(done_rows) + engine.n_new
    return RunResult(
        run_dir=log.dir, run_id=log.meta["run_id"], status=status, reason=reason, n_points=n_rows,
        n_new=engine.n_new, n_planned=engine.total,
        points_sha256=log.meta.get("points_sha256"), supply_safe=safe,
    )
