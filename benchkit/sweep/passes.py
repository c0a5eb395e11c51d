"""Adaptive bias steps in the engine: pass after pass of loops that the sample's planner
(benchkit/sweep/adaptive.py) asks for, with the turning points each loop needs."""

from __future__ import annotations

from benchkit.sweep.adaptive import measured_point
from benchkit.sweep.plan import PlannedPoint, SampleSweep


class AdaptivePasses:
    """The engine's adaptive job (mixed into benchkit.sweep.engine.SweepEngine)."""

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
                self.progress.total = self.progress_total()
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
        """Reach a turning point of the loop and wait there (without reading a point): the
        part has to be charged to it, or it turns short of the top and its falling points
        follow another branch. A policy with a turn_wait() says how long that is (settle
        detection by prediction: the charging only, benchkit/sweep/settle.py); else the
        policy waits as for a point."""
        self.supply.ramp_to(bias_V, self.plan.max_ramp_V_per_s, self.gclock)
        wait = getattr(self.policy, "turn_wait", self.policy.wait)
        settle = wait(self.gclock, lambda: self._probe(sw.conditions))
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
            "passes": max(1, planner.passes_measured),
            "stop_reason": last.stop_reason,
            "n_points": len(self._measured.get(sw.sample.sample_id) or []),
            "top_V": planner.top_V,
            **{k: v for k, v in _pass_record(last).items() if k in ("status", "remanent_V", "turn_shift_V")},
        }
        self.log.save()



def _pass_record(p) -> dict:
    """A benchkit.sweep.adaptive.PassPlan as plain data for run.json."""
    return {
        "pass": p.index,
        "points_V": [[br, v] for br, v in p.points],
        "stop_reason": p.stop_reason,
        "status": {b: st.to_dict() for b, st in p.status.items()},
        "remanent_V": p.remanent_V,
        "turn_shift_V": getattr(p, "turn_shift_V", None),
        "open": bool(getattr(p, "open", False)),
    }
