"""One bias point: reach it, dwell by the policy, read the meter, read back the supply, the
level across the part and the temperature, and build the row that goes into points.csv.

With a policy that predicts the settled value (benchkit/sweep/settle.py, prediction rule) the
readings of the dwell are the point's readings: no more are taken after it. C_F is then the
predicted settled value and C_std_F is its standard uncertainty times sqrt(n_readings), so
that C_std_F/sqrt(n_readings), the per-point sigma every reader of points.csv uses, is the
prediction's uncertainty (flag "predicted"). D and Rs_ohm are the means of those readings.
"""

from __future__ import annotations

import math

from benchkit.sweep.plan import Plan, PlannedPoint, SampleSweep
from benchkit.sweep.readings import check_point, level_flags, may_use
from benchkit.sweep.runlog import join_flags, utc_now

CURRENT_LIMIT_FRACTION = 0.98  # |I| at or above this share of the limit: the supply is limiting


class PointMeasurement:
    """The engine's per-point job (mixed into benchkit.sweep.engine.SweepEngine)."""

    def _measure_point(self, sw: SampleSweep, p: PlannedPoint, resumed: bool) -> dict:
        plan, cond = self.plan, sw.conditions
        self._note_recoveries()  # before this point (configuring, ramping down): events only
        self.supply.ramp_to(p.bias_V, plan.max_ramp_V_per_s, self.gclock)
        t_reached = self.clock.now()
        self._dwell_readings = []
        settle = self.policy.wait(self.gclock, lambda: self._probe(cond))
        values, times, overload, bad_status = [], [], False, False
        pred = getattr(settle, "prediction", None)
        if pred is not None:  # the readings the prediction was made from
            t_fit = settle.fit_from_s
            times = [t for t, v in self._dwell_readings if v is not None and t >= t_fit]
            values = [v for t, v in self._dwell_readings if v is not None and t >= t_fit]
            overload = any(v is None for _, v in self._dwell_readings)
        for _ in range(0 if pred is not None else plan.n_readings):
            r = self.meter.measure()
            t = self.clock.now()
            if r.overload or not getattr(r, "status_ok", True):
                overload = overload or r.overload
                bad_status = bad_status or not r.overload
                continue
            values.append(_convert(r.primary, r.secondary, cond.function, cond.freq_Hz))
            times.append(t)
        t_first = times[0] if times else self.clock.now()
        ac_dut = self.meter.ac_dut_Vrms if may_use(self._raw["meter"], "level_monitor") else None
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
        if bad_status:
            flags.append("meter_status")
        off_level = level_flags(ac_dut, self._standard.ac_level_Vrms)
        flags += off_level
        if resumed:
            flags.append("resumed")
        if self._note_recoveries():
            flags.append("retried")
        flags += list(getattr(settle, "flags", ()))  # e.g. max_dwell from settle detection
        # a point has a few readings: plain floats (math.fsum) cost less than arrays here
        n = len(values)
        Cs, Ds, Rss = (list(col) for col in zip(*values)) if n else ([], [], [])
        C = _mean(Cs) if n else None
        C_std = _stdev(Cs) if n >= 2 else None
        D_mean = _mean(Ds) if n else None
        Rs_mean = _mean(Rss) if n else None
        if n:   # believed only if it can be this part (stops the run if not)
            secondary = Rs_mean if cond.function == "CSRS" else D_mean
            flags += check_point(self._expected, p.bias_V, C, D_mean, secondary, cond.function,
                                 getattr(getattr(self._raw["meter"], "profile", None), "name", "?"),
                                 at_standard=ac_dut is not None and not off_level)
        if pred is not None and n:
            C, C_std = pred.C_inf_F, pred.u_C_inf_F * math.sqrt(n)
            flags.append("predicted")
        drift = None
        if n >= 2 and times[-1] > times[0] and C:
            t_mean = _mean(times)  # least-squares slope about the mean time
            dt = [t - t_mean for t in times]
            slope = math.fsum(d * c for d, c in zip(dt, Cs)) / math.fsum(d * d for d in dt)
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
            "ac_level_dut_Vrms": None if ac_dut is None else float(ac_dut),
            "C_F": C,
            "C_std_F": C_std,
            "D": D_mean,
            "Rs_ohm": Rs_mean,
            "n_readings": n,
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
        """One reading for the dwell policy (kept, with its time, for a predicting one)."""
        r = self.meter.measure()
        if r.overload or not getattr(r, "status_ok", True):
            self._dwell_readings.append((self.clock.now(), None))
            return math.nan  # a dwell policy leaves it out
        v = _convert(r.primary, r.secondary, cond.function, cond.freq_Hz)
        self._dwell_readings.append((self.clock.now(), v))
        return v[0]



def _mean(xs) -> float:
    return math.fsum(xs) / len(xs)


def _stdev(xs) -> float:
    """Sample standard deviation (n - 1 in the denominator), two-pass."""
    m = _mean(xs)
    return math.sqrt(math.fsum((x - m) ** 2 for x in xs) / (len(xs) - 1))


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
