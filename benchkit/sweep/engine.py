"""The bias-sweep engine: ramp, dwell, read, log, one point at a time.

For each sample: select its channel (break before make), start at 0 V with the output on,
ramp to each planned bias at the plan's rate on the run's clock, dwell (a policy object),
read the meter n_readings times, read back the supply, the AC level across the part and the
temperature, and write the point to disk before the next step (benchkit/sweep/point.py). At
the end of a sample ramp to 0 V; at the end of the run switch the output off and wait for
the parts to discharge. Adaptive samples add passes (passes.py); link recoveries are
recorded (recovery.py). Starting, resuming and the shutdown that always ends at 0 V with the
output off are in run.py.
"""

from __future__ import annotations

from benchkit.sweep.dwell import dwell_policy
from benchkit.sweep.frequency import FrequencyList, is_frequency_row
from benchkit.sweep.passes import AdaptivePasses
from benchkit.sweep.plan import Plan, PlannedPoint, SampleSweep
from benchkit.catalogue.conditions import standard_conditions
from benchkit.sweep.point import PointMeasurement
from benchkit.sweep.readings import Expected, may_use
from benchkit.sweep.recovery import LinkRecoveries
from benchkit.sweep.runlog import RunLog, join_flags
from benchkit.sweep.safety import Guarded, GuardedClock, SignalGuard
from benchkit.sweep.temperature import TemperatureVisits
from benchkit.units import format_value


class SweepEngine(PointMeasurement, AdaptivePasses, LinkRecoveries, TemperatureVisits,
                  FrequencyList):
    """The loop over samples and points; each point, pass and recovery by its own module."""

    def __init__(self, inst, sweeps, plan: Plan, log: RunLog, clock, progress, guard, done_rows):
        self.plan, self.sweeps, self.log, self.progress, self.guard = plan, sweeps, log, progress, guard
        self.clock = clock
        self.gclock = GuardedClock(clock, guard) if isinstance(guard, SignalGuard) else clock
        wrap = (lambda x: Guarded(x, guard)) if isinstance(guard, SignalGuard) else (lambda x: x)
        self.meter = wrap(inst.meter)
        self.supply = wrap(inst.supply)
        self.scanner = wrap(inst.scanner)
        self.thermo = wrap(inst.thermometer)
        chamber = getattr(inst, "chamber", None)
        self.chamber = wrap(chamber) if chamber is not None else None
        self.policy = dwell_policy(plan)
        self._measured: dict[str, list] = {}  # sample_id -> rows so far (adaptive planning)
        adaptive = {sw.sample.sample_id for sw in sweeps if sw.adaptive is not None}
        self.done, last = 0, None
        for r in done_rows:  # one pass: a resume streams them from disk (runlog.StoredRows)
            if is_frequency_row(r):  # a point's frequency list rides with it
                continue
            self.done, last = self.done + 1, r
            if r["sample_id"] in adaptive:
                self._measured.setdefault(r["sample_id"], []).append(r)
        self.resumed = self.done > 0
        self.n_new = 0
        self.total = sum(len(sw.points) for sw in sweeps)
        self.t0 = clock.now()
        self.t_offset = float(last["t_s"] or 0.0) if last is not None else 0.0
        self.current: PlannedPoint | None = None
        self.output_on = False
        self.output_off_done = False  # the normal end was reached: all points, output off
        self._ref_temp = None
        self._dwell_readings: list = []  # (time, (C_F, D, Rs_ohm) or None) of the last dwell
        self._raw = {"meter": inst.meter, "supply": inst.supply, "scanner": inst.scanner,
                     "thermometer": inst.thermometer}
        if chamber is not None:
            self._raw["chamber"] = chamber
        self._watch_links()

    def progress_total(self) -> int:
        """The points planned, and those every stepped first loop still has to plan at least
        (benchkit/sweep/adaptive.py least_points_ahead): what the progress line counts to."""
        return self.total + sum(sw.adaptive.least_points_ahead for sw in self.sweeps
                                if sw.adaptive is not None)

    def t_s(self) -> float:
        return self.t_offset + (self.clock.now() - self.t0)

    def where(self) -> str:
        p = self.current
        if p is None and self.soaking:
            return f"{self.soaking}; {self.done} of {self.total} points saved"
        if p is None:
            return f"after {self.done} of {self.total} points"
        return (f"at sample {p.sample_id} repeat {p.repeat} step {p.step_index} "
                f"({p.branch}, {p.bias_V:g} V); {self.done} of {self.total} points saved")

    # -- the sweep -----------------------------------------------------------
    def run(self) -> None:
        if self.progress is not None:
            self.progress.start(self.progress_total(), self.done)
        skip = self.done  # points already on disk, in plan order (resume)
        s = self.supply
        if s.output_on:  # e.g. left on by a killed run: never jump a charged part to 0 V
            s.ramp_to(0.0, self.plan.max_ramp_V_per_s, self.gclock)
        s.output_on = False
        s.voltage_V = 0.0
        s.current_limit_A = self.plan.current_limit_A
        if self.plan.frequency is not None:
            self._frequency_setup(self.log.dir, self.resumed)  # open/short residuals at 0 V, output off
        first_in_session = True
        for sw in self.sweeps:
            # the planned points are made one at a time (PlannedPoints): constant memory per point
            n = len(sw.points)
            start = min(skip, n)
            skip -= start
            if start == n and (sw.adaptive is None or sw.adaptive.stopped):
                if sw.adaptive is not None:
                    self._adaptive_record(sw)
                continue
            self._enter_temperature(sw)  # bias off, chamber to the visit's set point, soak
            self._start_sample(sw)
            if first_in_session and self.resumed and 0 < start < n:
                self._approach(sw, sw.points[start], start)
            self._ref_temp = None
            for k in range(start, n):
                self._take_point(sw, sw.points[k], resumed=first_in_session and self.resumed and k > 0)
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
        extra = self._frequency_rows(sw, p, row)
        # an error the meter or thermometer raised while this point was read stops the run
        # before the point is written (SCPI SYSTem:ERRor?), so no row follows an error unflagged
        for drv in (self.meter, self.thermo):
            drv.check_errors(after=f"measuring {p.sample_id} step {p.step_index}")
        if self._note_recoveries():  # a retry while reading the queues belongs to this point
            row["flags"] = join_flags([*filter(None, row["flags"].split(";")), "retried"])
        if self._ref_temp is None:
            self._ref_temp = row["temp_C"]
        elif row["temp_C"] is not None and \
                abs(row["temp_C"] - self._ref_temp) > self.plan.limits["temp_tolerance_C"]:
            row["flags"] = join_flags([*filter(None, row["flags"].split(";")), "temp_change"])
        with self.guard.transaction():  # a row (with its frequency list) is written whole or not
            self.log.append_point(row)  # at all, and counted with it (a signal deferred to the end
            for r in extra:  # of this block must find it counted)
                self.log.append_point(r)
            if sw.adaptive is not None:  # its planner needs the rows; other samples' stay on disk
                self._measured.setdefault(p.sample_id, []).append(row)
            self.done += 1
            self.n_new += 1
        if self.progress is not None:
            c = row["C_F"]
            ctext = "overload" if c is None else f"C = {format_value(c, 'F', digits=5)}"
            self.progress.point(self.done, f"{p.sample_id} {p.branch} {p.bias_V:+g} V: {ctext}")
        return row

    def _start_sample(self, sw: SampleSweep) -> None:
        c = sw.conditions
        self.scanner.select(sw.sample.channel)  # opens all, then closes one: break before make
        self.meter.function = c.function
        self.meter.freq_Hz = c.freq_Hz
        if may_use(self._raw["meter"], "level_control"):   # the set level is the part's level
            self.meter.level_control_on = True
        self.meter.ac_level_Vrms = c.ac_level_Vrms
        self.meter.check_errors()
        self._expected = Expected.of_part(sw.part)
        self._standard = standard_conditions(sw.part.class_code, sw.part.nominal_C_F)
        if not self.output_on:
            self.supply.voltage_V = 0.0
            self.supply.output_on = True
            self.output_on = True
        if hasattr(self.policy, "start_sample"):  # settle detection: the sample's own C0
            from benchkit.sweep.settle import largest_C_F

            self.policy.start_sample(largest_C_F(sw.part))  # and its charge wait
        self.log.event(self.t_s(), "sample_start", sample_id=sw.sample.sample_id, channel=sw.sample.channel)
        self.log.save()

    def _approach(self, sw: SampleSweep, first: PlannedPoint, start: int) -> None:
        """After a resume mid-sample, restart the interrupted branch from 0 V: pass through
        every earlier point of the loop without reading (each with its dwell), so a falling
        point is reached from the top and a rising one from below, on the bias history it had
        (benchkit/sweep/resume.py retrace_path); the event says which points were retraced."""
        if sw.adaptive is not None and first.repeat >= 2:
            return  # _lead_in turns at the top first, as the pass would have
        from benchkit.sweep.resume import retrace_path

        path = retrace_path(sw, start)
        if not path:
            return
        self.log.event(self.t_s(), "resume_branch_restart", sample_id=sw.sample.sample_id,
                       repeat=first.repeat, branch=first.branch, from_V=0.0, retraced_V=path,
                       how="the interrupted branch restarts from 0 V through the loop's earlier "
                           "points (dwell, no reading); its first point is flagged 'resumed'")
        if self.progress is not None:
            self.progress.note(f"benchkit: {sw.sample.sample_id}: the interrupted {first.branch} branch "
                               f"restarts from 0 V through {len(path)} earlier point(s), not read again")
        if first.branch == "falling":
            before = [sw.points[j] for j in range(start - len(path), start)]
            peak = next((p for p in reversed(before) if p.branch == "rising"), None)
            if peak is not None:
                self.log.event(self.t_s(), "resume_approach", sample_id=sw.sample.sample_id,
                               via_V=peak.bias_V)
        for v in path:
            self.supply.ramp_to(v, self.plan.max_ramp_V_per_s, self.gclock)
            self.policy.wait(self.gclock, lambda: self._probe(sw.conditions))

    def finish(self, wait_s: float) -> None:
        """Normal end: 0 V, output off, then the discharge wait before anyone handles parts."""
        self.current = None
        self.supply.ramp_to(0.0, self.plan.max_ramp_V_per_s, self.gclock)
        self.supply.output_on = False
        self.output_on = False
        self._note_recoveries()  # a fault on the final OUTPut OFF is recorded like any other
        if self.supply.output_on:  # read back: logged as off only once it is
            from instruments.drivers.errors import InstrumentError

            raise InstrumentError("supply: still reports its output on after OUTPut OFF; "
                                  "switch it off by hand", role="supply")
        self.output_off_done = True
        self.log.event(self.t_s(), "output_off", discharge_wait_s=wait_s)
        if wait_s > 0:
            self.gclock.sleep(wait_s)
        self.scanner.open_all()
