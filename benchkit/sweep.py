"""The bias-sweep engine: ramp, dwell, read, log, one point at a time, and always end safe.

For each sample: select its channel (break before make), start at 0 V with the output on,
ramp to each planned bias at the plan's rate on the run's clock, dwell (a policy object),
read the meter n_readings times, read back the supply, the AC level across the part and the
temperature, and write the point to disk before the next step. At the end of a sample ramp
to 0 V; at the end of the run switch the output off and wait for the parts to discharge.

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
import math
import sys
import uuid
from dataclasses import dataclass, fields
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Mapping, Protocol

import numpy as np

from benchkit import __version__
from benchkit.benchfile import BenchFile, Instruments, bench_from_dict, load_bench, open_instruments, parse_bench_text
from benchkit.errors import EXIT_FAILED, EXIT_OK, UserError
from benchkit.plan import (
    Plan,
    PlannedPoint,
    SampleRef,
    SampleSweep,
    build_sweeps,
    discharge_wait_s,
    parse_plan,
    resolve_samples,
)
from benchkit.progress import Progress
from benchkit.runlog import FLAGS, RunFileError, RunLog, join_flags, utc_now
from benchkit.safety import (
    Guarded,
    GuardedClock,
    Interrupted,
    SignalGuard,
    arm_last_resort,
    disarm_last_resort,
)
from instruments.sim.parts import PartSpec, catalogue_dict

CURRENT_LIMIT_FRACTION = 0.98  # |I| at or above this share of the limit: the supply is limiting


# --------------------------------------------------------------------------- dwell policies


class DwellPolicy(Protocol):
    """How long to wait at a new bias before reading (fixed, or settle detection).

    wait() returns settle_s as a float; a policy that watched the part may return a float
    that also carries `drift_pct_per_s` (its own drift estimate, which then goes into the
    row) and `flags` (words of benchkit.runlog.FLAGS, e.g. "max_dwell"): see
    benchkit.settle.SettleResult. `dwell_s` is what the row's dwell_s column records: the
    fixed dwell, or the longest a watching policy may wait.
    """

    name: str
    dwell_s: float

    def wait(self, clock, probe: Callable[[], float]) -> float:
        """Wait on `clock` (probe() reads C_F, NaN on overload); return settle_s."""


class FixedDwell:
    """Wait a fixed time: the reading is taken dwell_s after the bias was reached."""

    name = "fixed"

    def __init__(self, dwell_s: float):
        self.dwell_s = float(dwell_s)

    def wait(self, clock, probe: Callable[[], float]) -> float:
        clock.sleep(self.dwell_s)
        return self.dwell_s


def _settle_policy(plan: Plan) -> DwellPolicy:
    from benchkit.settle import SettleDetector

    return SettleDetector.from_plan(plan.settle)


DWELL_POLICIES: dict[str, Callable[[Plan], DwellPolicy]] = {
    "fixed": lambda plan: FixedDwell(plan.measure["dwell_s"]),
    "settle": _settle_policy,
}


def dwell_policy(plan: Plan) -> DwellPolicy:
    return DWELL_POLICIES[plan.measure["dwell"]](plan)


# --------------------------------------------------------------------------- results


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


def load_parts_catalogue(path: str | Path | None = None) -> dict:
    """The parts catalogue (default: the demo parts); a bad file is a UserError."""
    from instruments.sim.parts import DEMO_PARTS, PartsFileError, load_parts

    try:
        return load_parts(DEMO_PARTS if path is None else path)
    except PartsFileError as exc:
        raise UserError(str(exc)) from None
    except FileNotFoundError:
        raise UserError(f"{path}: parts file not found; give an existing file to --parts") from None


# --------------------------------------------------------------------------- bench sources


class _Source:
    """Where the instruments come from: a bench file, an embedded SimBench, or open drivers."""

    def __init__(self, obj: Any, io_timeout_s: float | None):
        self.sim = None
        self.instruments: Instruments | None = None
        self.io_timeout_s = io_timeout_s
        if isinstance(obj, Instruments):
            self.instruments = obj
            self.bench = None
            self.channels = tuple(getattr(obj, "channels", ()) or ())
        elif isinstance(obj, BenchFile):
            self.bench = obj
        elif isinstance(obj, (str, Path)):
            self.bench = load_bench(obj)
        elif hasattr(obj, "bench_file_text") and hasattr(obj, "resources"):
            self.sim = obj
            self.bench = parse_bench_text(obj.bench_file_text(), "simulated bench")
        else:
            raise TypeError(f"run_sweep needs a bench file, a SimBench or Instruments, not {type(obj).__name__}")
        if self.bench is not None:
            self.channels = self.bench.channels

    @contextlib.contextmanager
    def open(self):
        if self.instruments is not None:
            yield self.instruments
            return
        with open_instruments(self.bench, self.io_timeout_s) as inst:
            yield inst

    def supply_range_V(self) -> tuple[float, float] | None:
        ref = None if self.bench is None else self.bench.instruments["supply"]
        if ref is None:
            return _range_of(self.instruments.supply) if self.instruments else None
        return supply_profile_range(ref.profile)

    def record(self) -> dict:
        if self.bench is None:
            return {"kind": "instruments", "source": None}
        rec = {"kind": "sim" if self.sim is not None else "file"}
        rec.update(self.bench.to_dict())
        return rec


def supply_profile_range(profile: str) -> tuple[float, float] | None:
    """The programmable voltage range a supply profile declares (setting voltage_V)."""
    from instruments.drivers import load_profile
    from instruments.drivers.errors import ProfileError

    try:
        prof = load_profile(profile, kind="dc-supply")
    except ProfileError as exc:
        raise UserError(str(exc)) from None
    spec = prof.settings.get("voltage_V")
    if spec is None or spec.min is None or spec.max is None:
        return None
    return float(spec.min), float(spec.max)


def _range_of(supply) -> tuple[float, float] | None:
    rng = getattr(supply, "voltage_range_V", None)  # BiasSupply: from its profile
    if rng is None or None in rng:
        return None
    return float(rng[0]), float(rng[1])


# --------------------------------------------------------------------------- public API


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
) -> RunResult:
    """Run `plan` on a bench into the new directory `out_dir`.

    `bench_or_instruments`: a bench-file path or BenchFile, a started SimBench (its clock is
    used unless `clock` is given), or open `Instruments`. Everything is validated before any
    voltage is applied (UserError). `before_output` is called once the instruments answered
    and the run directory exists, just before the supply is touched (e.g. to print cautions).
    Returns how the run ended; the supply is off either way.
    """
    parts = load_parts_catalogue() if parts is None else parts
    src = _Source(bench_or_instruments, io_timeout_s)
    clock = _pick_clock(clock, src)
    samples = resolve_samples(plan, src.channels)
    sweeps = build_sweeps(plan, samples, parts, src.supply_range_V())
    wait_s, wait_how = discharge_wait_s(plan, sweeps)
    with src.open() as inst:
        meta = _new_meta(plan, sweeps, inst, src, clock, wait_s, wait_how, extra_record)
        log = RunLog.create(out_dir, meta)
        log.event(0.0, "start", points_planned=meta["n_points_planned"])
        log.save()
        if before_output is not None:
            before_output()
        return _execute(inst, sweeps, plan, log, clock, progress, handle_signals, src, [], wait_s)


def resume_sweep(
    run_dir: str | Path,
    bench_or_instruments: Any,
    clock: Any = None,
    progress: Progress | None = None,
    *,
    plan: Plan | None = None,
    handle_signals: bool = True,
    io_timeout_s: float | None = None,
    before_output: Callable[[], None] | None = None,
) -> RunResult:
    """Continue an interrupted run from its last complete point (also after kill -9).

    The plan, samples and parts come from run.json; `plan`, when given, must be the same
    plan (same hash). Points already in points.csv are not measured again.
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
        samples, parts = _samples_from_meta(meta, run_dir)
        src = _Source(bench_or_instruments, io_timeout_s)
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
        sweeps = [_replay_adaptive(sw, log.rows) if sw.adaptive is not None else sw for sw in sweeps]
        _check_prefix(log.rows, sweeps, meta["run_id"], run_dir)
        wait_s = float(meta.get("discharge_wait_s") or 0.0)
        with src.open() as inst:
            # the session's clock and instruments go into the event; the top level keeps the first
            log.event(None, "resume", points_done=len(log.rows), instruments=inst.record(),
                      clock="virtual" if getattr(clock, "virtual", False) else "real")
            log.set_status("running")
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


def _pick_clock(clock, src: _Source):
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
                "n_points": len(sw.points),
            }
            for sw in sweeps
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


def _samples_from_meta(meta: Mapping, run_dir) -> tuple[list[SampleRef], dict]:
    samples, parts = [], {}
    try:
        for s in meta["samples"]:
            samples.append(SampleRef(s["sample_id"], s["part_id"], int(s["channel"]),
                                     s.get("hours_since_heat_h")))
            parts[s["part_id"]] = PartSpec(**{f.name: s["part"][f.name] for f in fields(PartSpec) if f.name != "sim"})
    except (KeyError, TypeError, ValueError) as exc:
        raise UserError(f"{run_dir}/run.json: field 'samples' is incomplete ({exc}); cannot resume") from None
    return samples, parts


def measured_point(row: Mapping[str, Any]):
    """A points.csv row (text or values) as benchkit.adaptive.MeasuredPoint."""
    from benchkit.adaptive import MeasuredPoint

    def num(v):
        return None if v is None or v == "" else float(v)

    C, s, n = num(row["C_F"]), num(row["C_std_F"]), num(row["n_readings"])
    sigma = s / math.sqrt(n) if s is not None and n and s > 0 else None
    return MeasuredPoint(row["branch"], float(row["bias_set_V"]), C, sigma)


def _replay_adaptive(sw: SampleSweep, rows) -> SampleSweep:
    """The points an adaptive sample had planned when the run stopped: its planner is fed
    the rows on disk pass by pass (it is deterministic), so a resume measures exactly the
    points the interrupted session would have."""
    from dataclasses import replace

    mine = [r for r in rows if r["sample_id"] == sw.sample.sample_id]
    points = list(sw.points)
    planner = sw.adaptive
    while len(mine) >= len(points) and not planner.stopped:
        nxt = planner.next_pass([measured_point(r) for r in mine[: len(points)]])
        points += [PlannedPoint(sw.sample.sample_id, nxt.index, len(points) + i, br, v)
                   for i, (br, v) in enumerate(nxt.points)]
    return replace(sw, points=tuple(points))


def _check_prefix(rows, sweeps, run_id, run_dir) -> None:
    """The rows on disk must be the first planned points, in order, of this run."""
    planned = [p for sw in sweeps for p in sw.points]
    if len(rows) > len(planned):
        raise UserError(f"{run_dir}/points.csv: {len(rows)} rows but the plan has {len(planned)} points; not this run's file")
    for n, (row, p) in enumerate(zip(rows, planned), start=2):
        ok = (
            row["run_id"] == run_id
            and row["sample_id"] == p.sample_id
            and row["repeat"] == str(p.repeat)
            and row["step_index"] == str(p.step_index)
            and row["branch"] == p.branch
            and abs(float(row["bias_set_V"]) - p.bias_V) <= 1e-9
        )
        if not ok:
            raise UserError(
                f"{run_dir}/points.csv: line {n} ({row['sample_id']} repeat {row['repeat']} step "
                f"{row['step_index']}) is not planned point {p.sample_id} repeat {p.repeat} step "
                f"{p.step_index} of run {run_id}; the file was edited or mixed with another run"
            )


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
    engine = _Engine(inst, sweeps, plan, log, clock, progress, guard, done_rows)
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
            if status == "complete":
                log.event(t, "complete", points_new=engine.n_new)
            else:
                log.event(t, "abort", reason=reason, points_new=engine.n_new,
                          caution=f"parts may still hold charge: wait {wait_s:g} s and check before handling")
                if progress is not None:
                    progress.note(f"benchkit: parts may still hold charge; wait {wait_s:g} s and check before handling")
            if not safe:
                why = getattr(raw_supply, "last_safe_off_error", None) or "safe_off could not confirm 0 V and output off"
                log.event(t, "supply_not_confirmed_safe",
                          detail=f"{why}; the output may still be live: check the supply by hand")
                print(f"benchkit: WARNING: {why}; the supply's output may still be live: switch it off "
                      "by hand and check the fixture before touching it", file=sys.stderr)
            if src.sim is not None and hasattr(src.sim, "supply_state"):
                with contextlib.suppress(Exception):
                    log.meta["sim_final_supply_state"] = dict(src.sim.supply_state())
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


class _Engine:
    def __init__(self, inst, sweeps, plan: Plan, log: RunLog, clock, progress, guard, done_rows):
        self.plan, self.sweeps, self.log, self.progress, self.guard = plan, sweeps, log, progress, guard
        self.clock = clock
        self.gclock = GuardedClock(clock, guard) if isinstance(guard, SignalGuard) else clock
        wrap = (lambda x: Guarded(x, guard)) if isinstance(guard, SignalGuard) else (lambda x: x)
        self.meter = wrap(inst.meter)
        self.supply = wrap(inst.supply)
        self.scanner = wrap(inst.scanner)
        self.thermo = wrap(inst.thermometer)
        self.policy = dwell_policy(plan)
        self.done = len(done_rows)
        self.resumed = bool(done_rows)
        self.n_new = 0
        self.total = sum(len(sw.points) for sw in sweeps)
        self.t0 = clock.now()
        self.t_offset = float(done_rows[-1]["t_s"] or 0.0) if done_rows else 0.0
        self.current: PlannedPoint | None = None
        self.output_on = False
        self.output_off_done = False  # the normal end was reached: all points, output off
        self._measured: dict[str, list] = {}  # sample_id -> rows so far (adaptive planning)
        for r in done_rows:
            self._measured.setdefault(r["sample_id"], []).append(r)
        self._ref_temp = None
        self._raw = {"meter": inst.meter, "supply": inst.supply, "scanner": inst.scanner,
                     "thermometer": inst.thermometer}
        self._links = self._link_counts()

    # -- link recoveries (the drivers retry, resync and reconnect; the run records it) ---------
    RETRY_COUNTERS = ("timeouts", "garbled", "link_errors", "reconnects")

    def _link_counts(self) -> dict:
        out = {}
        for role, drv in self._raw.items():
            session = getattr(drv, "session", None)
            counters = getattr(session, "counters", None)
            if counters is not None:
                out[role] = (dict(counters), list(getattr(session, "events", ())))
        return out

    def _note_recoveries(self) -> bool:
        """Log what each link recovered from since the last look (event link_recovered).

        After the supply's link was reopened its output must still be on: a supply that
        restarted comes back with its output off, and measuring on would log 0 V points.
        """
        now = self._link_counts()
        seen = False
        for role, (counts, events) in now.items():
            before, old_events = self._links.get(role, ({}, []))
            delta = {k: counts.get(k, 0) - before.get(k, 0) for k in self.RETRY_COUNTERS
                     if counts.get(k, 0) > before.get(k, 0)}
            if not delta:
                continue
            seen = True
            new = events[len(old_events):] if len(events) > len(old_events) else events[-5:]
            self.log.event(self.t_s(), "link_recovered", role=role, at=self.where(), **delta,
                           detail=new[-10:])
            if role == "supply" and delta.get("reconnects") and self.output_on and not self.supply.output_on:
                from instruments.drivers.errors import InstrumentError

                res = getattr(self._raw["supply"], "resource", "?")
                raise InstrumentError(
                    f"supply ({res}): after reconnecting, its output reads off although the sweep "
                    "had it on (the supply may have restarted, or an interlock tripped); the sweep "
                    "stops here: check the supply, its mains and interlock, then resume",
                    role="supply", resource=res, command="OUTPut?")
        self._links = now
        return seen

    def t_s(self) -> float:
        return self.t_offset + (self.clock.now() - self.t0)

    def where(self) -> str:
        p = self.current
        if p is None:
            return f"after {self.done} of {self.total} points"
        return (f"at sample {p.sample_id} repeat {p.repeat} step {p.step_index} "
                f"({p.branch}, {p.bias_V:g} V); {self.done} of {self.total} points saved")

    # -- the sweep -----------------------------------------------------------
    def run(self) -> None:
        if self.progress is not None:
            self.progress.start(self.total, self.done)
        planned = [(sw, p) for sw in self.sweeps for p in sw.points]
        todo = planned[self.done:]
        s = self.supply
        if s.output_on:  # e.g. left on by a killed run: never jump a charged part to 0 V
            s.ramp_to(0.0, self.plan.max_ramp_V_per_s, self.gclock)
        s.output_on = False
        s.voltage_V = 0.0
        s.current_limit_A = self.plan.current_limit_A
        first_in_session = True
        for sw in self.sweeps:
            pts = [p for (w, p) in todo if w is sw]
            if not pts and (sw.adaptive is None or sw.adaptive.stopped):
                if sw.adaptive is not None:
                    self._adaptive_record(sw)
                continue
            self._start_sample(sw)
            if first_in_session and self.resumed and pts and pts[0] is not sw.points[0]:
                self._approach(sw, pts[0])
            self._ref_temp = None
            for p in pts:
                mid_sample = p is not sw.points[0]
                self._take_point(sw, p, resumed=first_in_session and self.resumed and mid_sample)
                first_in_session = False
            if sw.adaptive is not None:
                self._adaptive_passes(sw, first_in_session and self.resumed)
                first_in_session = False
            self.current = None
            self.supply.ramp_to(0.0, self.plan.max_ramp_V_per_s, self.gclock)
            self._note_recoveries()
            # the meter and thermometer are only queried while measuring: read what their error
            # queues collected (SCPI SYSTem:ERRor?) before trusting the next sample to them
            for drv in (self.meter, self.thermo):
                drv.check_errors(after=f"measuring sample {sw.sample.sample_id}")
            self.log.event(self.t_s(), "sample_end", sample_id=sw.sample.sample_id)
            self.log.save()

    def _take_point(self, sw: SampleSweep, p: PlannedPoint, resumed: bool) -> dict:
        """Measure one planned point and put its row on disk."""
        self.current = p
        if sw.adaptive is not None:
            self._lead_in(sw, p)
        row = self._measure_point(sw, p, resumed=resumed)
        if self._ref_temp is None:
            self._ref_temp = row["temp_C"]
        elif row["temp_C"] is not None and \
                abs(row["temp_C"] - self._ref_temp) > self.plan.limits["temp_tolerance_C"]:
            row["flags"] = join_flags([*filter(None, row["flags"].split(";")), "temp_change"])
        with self.guard.transaction():  # a row is written whole or not at all
            self.log.append_point(row)
        self._measured.setdefault(p.sample_id, []).append(row)
        self.done += 1
        self.n_new += 1
        if self.progress is not None:
            c = row["C_F"]
            ctext = "overload" if c is None else f"C = {c:.5g} F"
            self.progress.point(self.done, f"{p.sample_id} {p.branch} {p.bias_V:+g} V: {ctext}")
        return row

    # -- adaptive bias steps (benchkit/adaptive.py) -------------------------------
    def _adaptive_passes(self, sw: SampleSweep, resumed: bool) -> None:
        """Ask the sample's planner for pass after pass and measure them, until it stops.

        Each pass is a loop at the plan's polarity: its rising points from 0 V up (so the
        bias first returns to 0 V), then up to the same top without reading and its falling
        points on the way down, so every falling point is on the branch that turns at the
        top (_lead_in)."""
        planner = sw.adaptive
        sid = sw.sample.sample_id
        while not planner.stopped:
            rows = self._measured.get(sid) or []
            nxt = planner.next_pass([measured_point(r) for r in rows])
            self.log.event(self.t_s(), "adaptive_pass", sample_id=sid, **_pass_record(nxt))
            self.log.save()
            if not nxt.points:
                break
            new = [PlannedPoint(sid, nxt.index, len(rows) + i, br, v)
                   for i, (br, v) in enumerate(nxt.points)]
            self.total += len(new)
            if self.progress is not None:
                self.progress.total = self.total
            for i, p in enumerate(new):
                self._take_point(sw, p, resumed=resumed and i == 0)
        self._adaptive_record(sw)

    def _lead_in(self, sw: SampleSweep, p: PlannedPoint) -> None:
        """Before a point of an adaptive pass after the first: its rising points start from
        0 V, its falling points from the top (the loop's turning points)."""
        if p.repeat < 2:
            return
        rows = self._measured.get(p.sample_id) or []
        prev = rows[-1] if rows else None
        same_pass = prev is not None and int(prev["repeat"]) == p.repeat
        if p.branch == "rising" and not same_pass:
            if prev is None or float(prev["bias_set_V"]) != 0.0:
                self._turn(sw, 0.0, p.repeat)
        elif p.branch == "falling" and not (same_pass and prev["branch"] == "falling"):
            if self.resumed and self.n_new == 0:
                self.log.event(self.t_s(), "resume_approach", sample_id=p.sample_id,
                               via_V=sw.adaptive.top_V)
            self._turn(sw, sw.adaptive.top_V, p.repeat)

    def _turn(self, sw: SampleSweep, bias_V: float, pass_index: int) -> None:
        """Reach a turning point of the loop and wait there by the dwell policy, as for a
        point (without reading one): the part has to be charged to it and to have relaxed,
        or it turns short of the top and its falling points follow another branch."""
        self.supply.ramp_to(bias_V, self.plan.max_ramp_V_per_s, self.gclock)
        settle = self.policy.wait(self.gclock, lambda: self._probe(sw.conditions))
        self.log.event(self.t_s(), "adaptive_turn", sample_id=sw.sample.sample_id,
                       pass_index=pass_index, bias_V=bias_V, settle_s=float(settle),
                       flags=list(getattr(settle, "flags", ())))

    def _adaptive_record(self, sw: SampleSweep) -> None:
        """Why the sample's adaptive steps stopped, into its run.json samples entry."""
        planner = sw.adaptive
        last = planner.history[-1] if planner.history else None
        entry = next((e for e in self.log.meta.get("samples", [])
                      if e.get("sample_id") == sw.sample.sample_id), None)
        if entry is None or last is None:
            return
        entry["adaptive"] = {
            "passes": max(1, len(planner.history) - (0 if last.points else 1)),
            "stop_reason": last.stop_reason,
            "n_points": len(self._measured.get(sw.sample.sample_id) or []),
            "top_V": planner.top_V,
            **{k: v for k, v in _pass_record(last).items() if k in ("status", "remanent_V", "turn_shift_V")},
        }
        self.log.save()

    def _start_sample(self, sw: SampleSweep) -> None:
        c = sw.conditions
        self.scanner.select(sw.sample.channel)  # opens all, then closes one: break before make
        self.meter.function = c.function
        self.meter.freq_Hz = c.freq_Hz
        self.meter.ac_level_Vrms = c.ac_level_Vrms
        self.meter.check_errors()
        if not self.output_on:
            self.supply.voltage_V = 0.0
            self.supply.output_on = True
            self.output_on = True
        if hasattr(self.policy, "start_sample"):  # settle detection: the sample's own C0
            self.policy.start_sample()
        self.log.event(self.t_s(), "sample_start", sample_id=sw.sample.sample_id, channel=sw.sample.channel)
        self.log.save()

    def _approach(self, sw: SampleSweep, first: PlannedPoint) -> None:
        """After a resume, reach a falling-branch point from above, as the plan would have."""
        if first.branch != "falling":
            return
        if sw.adaptive is not None and first.repeat >= 2:
            return  # _lead_in turns at the top first, as the pass would have
        before = [p for p in sw.points if p.repeat == first.repeat and p.step_index < first.step_index]
        peak = next((p for p in reversed(before) if p.branch == "rising"), None)
        if peak is None:
            return
        self.log.event(self.t_s(), "resume_approach", sample_id=sw.sample.sample_id, via_V=peak.bias_V)
        self.supply.ramp_to(peak.bias_V, self.plan.max_ramp_V_per_s, self.gclock)

    def _measure_point(self, sw: SampleSweep, p: PlannedPoint, resumed: bool) -> dict:
        plan, cond = self.plan, sw.conditions
        self._note_recoveries()  # before this point (configuring, ramping down): events only
        self.supply.ramp_to(p.bias_V, plan.max_ramp_V_per_s, self.gclock)
        t_reached = self.clock.now()
        settle = self.policy.wait(self.gclock, lambda: self._probe(cond))
        values, times, overload = [], [], False
        for _ in range(plan.n_readings):
            r = self.meter.measure()
            t = self.clock.now()
            if r.overload:
                overload = True
                continue
            values.append(_convert(r.primary, r.secondary, cond.function, cond.freq_Hz))
            times.append(t)
        t_first = times[0] if times else self.clock.now()
        ac_dut = self.meter.ac_dut_Vrms
        v_meas = self.supply.measured_voltage_V
        i_meas = self.supply.measured_current_A
        temp = self.thermo.temperature_C
        flags = []
        if abs(v_meas - p.bias_V) > plan.limits["bias_tolerance_V"]:
            flags.append("bias_readback")
        if _in_current_limit(p.bias_V, v_meas, i_meas, plan):
            flags.append("current_limit")
        if overload:
            flags.append("overload")
        if resumed:
            flags.append("resumed")
        if self._note_recoveries():
            flags.append("retried")
        flags += list(getattr(settle, "flags", ()))  # e.g. max_dwell from settle detection
        arr = np.array(values) if values else np.empty((0, 3))
        C = float(arr[:, 0].mean()) if len(arr) else None
        C_std = float(arr[:, 0].std(ddof=1)) if len(arr) >= 2 else None
        drift = None
        if len(arr) >= 2 and times[-1] > times[0] and C:
            slope = np.polyfit(np.array(times) - times[0], arr[:, 0], 1)[0]
            drift = float(100.0 * slope / C)
        return {
            "run_id": self.log.meta["run_id"],
            "sample_id": p.sample_id,
            "part_id": sw.sample.part_id,
            "channel": sw.sample.channel,
            "step_index": p.step_index,
            "branch": p.branch,
            "repeat": p.repeat,
            "bias_set_V": p.bias_V,
            "bias_meas_V": float(v_meas),
            "bias_current_A": float(i_meas),
            "function": cond.function,
            "freq_Hz": cond.freq_Hz,
            "ac_level_set_Vrms": cond.ac_level_Vrms,
            "ac_level_dut_Vrms": float(ac_dut),
            "C_F": C,
            "C_std_F": C_std,
            "D": float(arr[:, 1].mean()) if len(arr) else None,
            "Rs_ohm": float(arr[:, 2].mean()) if len(arr) else None,
            "n_readings": len(arr),
            "temp_C": float(temp),
            "t_s": self.t_offset + (t_first - self.t0),
            "dwell_s": self.policy.dwell_s,
            "settle_s": float(settle if settle is not None else t_first - t_reached),
            # a watching policy's drift (over its window, at the end of the dwell) when it has
            # one; else the slope of this point's own readings
            "drift_pct_per_s": (float(settle.drift_pct_per_s)
                                if getattr(settle, "drift_pct_per_s", None) is not None else drift),
            "flags": join_flags(flags),
            "utc": utc_now(),
        }

    def _probe(self, cond) -> float:
        r = self.meter.measure()
        if r.overload:
            return math.nan  # a dwell policy leaves it out
        return _convert(r.primary, r.secondary, cond.function, cond.freq_Hz)[0]

    def finish(self, wait_s: float) -> None:
        """Normal end: 0 V, output off, then the discharge wait before anyone handles parts."""
        self.current = None
        self.supply.ramp_to(0.0, self.plan.max_ramp_V_per_s, self.gclock)
        self.supply.output_on = False
        self.output_on = False
        self.output_off_done = True
        self.log.event(self.t_s(), "output_off", discharge_wait_s=wait_s)
        if wait_s > 0:
            self.gclock.sleep(wait_s)
        self.scanner.open_all()


def _pass_record(p) -> dict:
    """A benchkit.adaptive.PassPlan as plain data for run.json."""
    return {
        "pass": p.index,
        "points_V": [[br, v] for br, v in p.points],
        "stop_reason": p.stop_reason,
        "status": {b: st.to_dict() for b, st in p.status.items()},
        "remanent_V": p.remanent_V,
        "turn_shift_V": getattr(p, "turn_shift_V", None),
    }


def _in_current_limit(set_V: float, meas_V: float, meas_A: float, plan: Plan) -> bool:
    """At the programmed limit, or sagging below the set voltage while sourcing current.

    A CV/CC bench supply holds its set voltage until the load asks for more than the limit;
    only then (constant-current mode) does the terminal voltage fall below the set value
    [common practice: CV/CC crossover of a bench supply].
    """
    if abs(meas_A) >= CURRENT_LIMIT_FRACTION * plan.current_limit_A:
        return True
    sag = abs(set_V) - abs(meas_V)
    sourcing = meas_A * set_V > 0
    return sourcing and sag > plan.limits["bias_tolerance_V"]


def _convert(primary: float, secondary: float, function: str, freq_Hz: float) -> tuple[float, float, float]:
    """(C_F, D, Rs_ohm) from a meter reading of the given function.

    D = w*Cs*Rs and Cp = Cs/(1 + D^2) [published: standard impedance-measurement handbook
    relations]; C_F is the primary quantity of the function (Cp for CPD, Cs otherwise).
    """
    w = 2.0 * math.pi * freq_Hz
    if function == "CPD":
        Cp, D = primary, secondary
        Cs = Cp * (1.0 + D * D)
        return Cp, D, D / (w * Cs)
    if function == "CSD":
        Cs, D = primary, secondary
        return Cs, D, D / (w * Cs)
    if function == "CSRS":
        Cs, Rs = primary, secondary
        return Cs, w * Cs * Rs, Rs
    raise ValueError(f"unknown meter function {function!r}")
