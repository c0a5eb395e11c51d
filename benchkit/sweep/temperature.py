"""Temperature visits: the plan's [temperature] table, the soak rule, and the chamber's way out.

A temperature plan measures every sample's bias sweep at each planned temperature in turn:
the temperature loop goes around the bias sweep. Between visits the bias goes to 0 V and the
supply output off (default; `bias_during_transition = "on-at-0V"` keeps it on at 0 V), the
chamber ramps to the next set point, and the run soaks:
1. the chamber's air (its own reading) within `band_C` of the set point, without a break,
   for `stable_s` (the chamber's STABLE state is logged, not trusted: it says nothing of the part);
2. then the part's reading settled: the capacitance of the visit's first sample at 0 V
   read every `poll_s`, its drift below `drift_pct_per_min` and the fixture's thermometer
   within `band_C` of the set point, for `drift_checks` polls in a row
   (common practice: soak until the chamber is stable within a band and the reading's drift
   per minute is below a limit; the part lags the air with the fixture's thermal time
   constant, minutes).
A soak that has not finished after `max_soak_s` stops the run (bias off, chamber safe).

Order of visits (`order`): "ascending" (default), "descending" or "as-listed"; class-2 parts
show thermal hysteresis near the Curie point, so a sweep in one direction is recorded as such
[common practice]. Points of visit k carry step indices k*n .. k*n + n - 1 (n planned steps a
sample), so every point keeps one key in points.csv and a resume finds its place.

Every way out: the bias first (0 V, output off, by the run's shutdown), then the chamber to
`safe_C` (a set point near room temperature: no condensation, no hot or cold surfaces
[common practice]); run.json records both.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any, Mapping

from benchkit.errors import UserError

ORDERS = ("ascending", "descending", "as-listed")
TRANSITION_BIAS = ("off", "on-at-0V")
MIN_SEPARATION_C = 5.0   # set points closer than this cannot be told apart by the readings
SAFE_RANGE_C = (10.0, 40.0)
SOAK_DEFAULTS = {"band_C": 1.0, "stable_s": 300.0, "drift_pct_per_min": 0.02, "drift_checks": 3,
                 "poll_s": 30.0, "max_soak_s": 4 * 3600.0}


def parse_temperature(raw: Any, where: str, fields_cls) -> dict:
    """Validate the [temperature] table of a plan into its normalised form."""
    if not isinstance(raw, Mapping):
        raise UserError(f"{where}: field 'temperature': must be a table [temperature]")
    f = fields_cls(raw, where, "temperature.")
    pts = f.take("points_C", required=True)
    if (not isinstance(pts, list) or not pts
            or any(isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x)
                   for x in pts)):
        raise UserError(f"{where}: field 'temperature.points_C': must be a non-empty list of "
                        f"temperatures in degC (got {pts!r})")
    pts = [float(x) for x in pts]
    srt = sorted(pts)
    for a, b in zip(srt, srt[1:]):
        if b - a < MIN_SEPARATION_C:
            raise UserError(f"{where}: field 'temperature.points_C': {a:g} and {b:g} degC are "
                            f"closer than {MIN_SEPARATION_C:g} degC; give each temperature once")
    out: dict[str, Any] = {"points_C": pts}
    out["order"] = f.choice("order", ORDERS, default="ascending")
    out["safe_C"] = f.number("safe_C", default=25.0, lo=SAFE_RANGE_C[0], hi=SAFE_RANGE_C[1])
    out["ramp_rate_C_per_min"] = f.number("ramp_rate_C_per_min", default=3.0, positive=True,
                                          hi=30.0)
    out["bias_during_transition"] = f.choice("bias_during_transition", TRANSITION_BIAS,
                                             default="off")
    soak = f.table("soak")
    s = fields_cls(soak, where, "temperature.soak.")
    out["soak"] = {
        "band_C": s.number("band_C", default=SOAK_DEFAULTS["band_C"], positive=True, hi=10.0),
        "stable_s": s.number("stable_s", default=SOAK_DEFAULTS["stable_s"], lo=0.0),
        "drift_pct_per_min": s.number("drift_pct_per_min", default=SOAK_DEFAULTS["drift_pct_per_min"],
                                      positive=True),
        "drift_checks": s.integer("drift_checks", default=SOAK_DEFAULTS["drift_checks"], lo=1, hi=100),
        "poll_s": s.number("poll_s", default=SOAK_DEFAULTS["poll_s"], positive=True),
        "max_soak_s": s.number("max_soak_s", default=SOAK_DEFAULTS["max_soak_s"], positive=True),
    }
    s.done()
    f.done()
    if out["soak"]["max_soak_s"] <= out["soak"]["stable_s"]:
        raise UserError(f"{where}: field 'temperature.soak.max_soak_s': must be longer than "
                        "stable_s, or no soak can ever finish")
    return out


def visits(temp: Mapping) -> list[float]:
    """The planned temperatures in the order the run visits them."""
    pts = list(temp["points_C"])
    if temp["order"] == "ascending":
        return sorted(pts)
    if temp["order"] == "descending":
        return sorted(pts, reverse=True)
    return pts


def expand_sweeps(plan, sweeps: list) -> list:
    """One SampleSweep per (visit, sample), in visit order; keys stay unique (module docstring)."""
    temp = plan.data.get("temperature")
    if not temp:
        return sweeps
    if any(sw.adaptive is not None for sw in sweeps):
        raise UserError(f"{plan.source}: [adaptive] steps and a [temperature] list together are "
                        "not supported; measure fixed steps at each temperature")
    out = []
    for k, T in enumerate(visits(temp)):
        for sw in sweeps:
            n = max(p.step_index for p in sw.points) + 1
            pts = tuple(replace(p, step_index=k * n + p.step_index) for p in sw.points)
            out.append(replace(sw, points=pts, temp_set_C=T))
    return out


def first_visits(sweeps: list) -> list:
    """Each sample's first sweep, in order (run.json lists a sample once, whatever its visits)."""
    seen, out = set(), []
    for sw in sweeps:
        if sw.sample.sample_id not in seen:
            seen.add(sw.sample.sample_id)
            out.append(sw)
    return out


def per_sample(sweeps: list) -> list:
    """One sweep per sample holding the points of all its visits (what run.json records)."""
    out = []
    for sw in first_visits(sweeps):
        visits = [w for w in sweeps if w.sample is sw.sample]
        # one visit keeps its points as they are (made when asked for, never all in memory)
        out.append(sw if len(visits) == 1 else
                   replace(sw, points=tuple(p for w in visits for p in w.points)))
    return out


class TemperatureVisits:
    """The engine's temperature job (mixed into benchkit.sweep.engine.SweepEngine)."""

    temp_now_C: float | None = None    # the set point soaked at, None before the first
    soaking: str | None = None         # where() text while soaking

    def _enter_temperature(self, sw) -> None:
        T = getattr(sw, "temp_set_C", None)
        if T is None or T == self.temp_now_C:
            return
        temp = self.plan.data["temperature"]
        if self.chamber is None:
            raise UserError("the plan has a [temperature] list but the bench has no chamber")
        if self.output_on:
            self.supply.ramp_to(0.0, self.plan.max_ramp_V_per_s, self.gclock)
            if temp["bias_during_transition"] == "off":
                self.supply.output_on = False
                self.output_on = False
        self.log.event(self.t_s(), "temperature_start", setpoint_C=T,
                       bias=temp["bias_during_transition"])
        self.log.save()
        self.chamber.go_to(T, temp["ramp_rate_C_per_min"] / 60.0)
        self._soak(sw, T, temp["soak"])
        self.temp_now_C = T

    def _soak(self, sw, T: float, soak: Mapping) -> None:
        t_start = self.clock.now()
        self.soaking = f"during the soak at {T:g} degC (sample {sw.sample.sample_id} next)"

        def overdue(what: str) -> None:
            if self.clock.now() - t_start > soak["max_soak_s"]:
                from instruments.drivers.errors import InstrumentError

                raise InstrumentError(
                    f"chamber: {what} after {soak['max_soak_s']:g} s at set point {T:g} degC "
                    f"(band +-{soak['band_C']:g} degC); check the chamber (door, load, controller) "
                    "and resume", role="chamber", resource=getattr(self._raw["chamber"], "resource", "?"),
                    command="soak")

        in_band_since = None
        while True:   # 1) the air in the band without a break for stable_s
            air = self.chamber.temperature_C
            now = self.clock.now()
            if abs(air - T) <= soak["band_C"]:
                in_band_since = now if in_band_since is None else in_band_since
                if now - in_band_since >= soak["stable_s"]:
                    break
            else:
                in_band_since = None
            overdue("the air never held the band")
            self.gclock.sleep(soak["poll_s"])
        self.log.event(self.t_s(), "soak_chamber_stable", setpoint_C=T, air_C=air,
                       chamber_state=self.chamber.state, soak_s=self.clock.now() - t_start)
        # 2) the part's reading settled: C of the visit's first sample at 0 V
        c = sw.conditions
        self.scanner.select(sw.sample.channel)
        self.meter.function = c.function
        self.meter.freq_Hz = c.freq_Hz
        self.meter.ac_level_Vrms = c.ac_level_Vrms
        prev, quiet, drift = None, 0, math.nan
        while quiet < soak["drift_checks"]:
            C = self.meter.measure().primary
            now = self.clock.now()
            fixture = self.thermo.temperature_C
            if prev is not None and math.isfinite(C) and C > 0 and now > prev[0]:
                drift = abs(C - prev[1]) / C * 100.0 / ((now - prev[0]) / 60.0)
                # where C hardly depends on T (near 25 degC for X7R) its drift alone says
                # little: the fixture's thermometer must be in the band as well
                ok = drift <= soak["drift_pct_per_min"] and abs(fixture - T) <= soak["band_C"]
                quiet = quiet + 1 if ok else 0
            prev = (now, C)
            if quiet >= soak["drift_checks"]:
                break
            overdue("the part's reading never settled")
            self.gclock.sleep(soak["poll_s"])
        self.log.event(self.t_s(), "soak_settled", setpoint_C=T, fixture_C=fixture,
                       drift_pct_per_min=drift, sample_id=sw.sample.sample_id,
                       soak_s=self.clock.now() - t_start)
        self.log.save()
        self.soaking = None


def check_chamber(plan, inst) -> None:
    """A temperature plan needs a chamber on the bench: bad input, before any output."""
    if plan.data.get("temperature") and getattr(inst, "chamber", None) is None:
        raise UserError(f"{plan.source}: the plan has a [temperature] list but the bench has no "
                        "chamber; add [instrument.chamber] to the bench file (benchkit sim serves "
                        "one) or remove [temperature]")


def chamber_shutdown(chamber, plan, log, t_s: float) -> bool | None:
    """After the bias is off: the chamber to the plan's safe temperature; recorded in run.json.

    None when the run has no chamber. Never raises."""
    if chamber is None:
        return None
    temp = plan.data.get("temperature") or {}
    safe_C = float(temp.get("safe_C", 25.0))
    rate = temp.get("ramp_rate_C_per_min")
    ok = bool(chamber.safe_return(safe_C, None if rate is None else rate / 60.0))
    detail = None if ok else (getattr(chamber, "last_safe_error", None)
                              or "safe_return could not confirm the set point")
    try:
        log.event(t_s, "chamber_safe" if ok else "chamber_not_confirmed_safe", setpoint_C=safe_C,
                  **({} if ok else {"detail": detail}))
        log.meta["chamber_final"] = {"setpoint_C": safe_C, "confirmed": ok}
    except Exception:
        pass
    return ok
