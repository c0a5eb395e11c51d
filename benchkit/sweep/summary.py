"""What the operator is told before the bias goes on, and what the supply said at the end.

Why: the last chance to catch a wrong plan is before the output is energised; one line per
sample with its highest bias, the current limit, the ramp rate and the expected duration is
short enough to be read. The expected duration is a lower bound (ramps at the plan's rate,
the dwell, no instrument time) for a fixed dwell, and a bound from the settle limits
otherwise.
"""

from __future__ import annotations

from typing import Any, Iterable

from benchkit.sweep.plan import Plan, SampleSweep
from benchkit.sweep.progress import format_duration


def expected_duration_s(plan: Plan, sw: SampleSweep) -> tuple[float, float]:
    """(shortest, longest) time the planned points of one sample take on the clock."""
    rate = plan.max_ramp_V_per_s
    ramp, prev = 0.0, 0.0
    # adaptive steps: the first loop at its fewest points (a stepped one is planned point by
    # point and has at least the even loop's, LoopPlanner.even_loop)
    biases = [v for _, v in sw.adaptive.even_loop()] if sw.adaptive is not None \
        else [p.bias_V for p in sw.points]
    for v in biases:
        ramp += abs(v - prev) / rate
        prev = v
    ramp += abs(prev) / rate  # back to 0 V at the end of the sample
    n = len(biases)
    if plan.measure["dwell"] == "settle" and plan.settle is not None:
        # a point waits at least the plan's minimum (the charge wait is sized from the C the
        # part reads at each bias, benchkit/sweep/settle.py), and at most the maximum dwell
        shortest = float(plan.settle["min_dwell_s"])
        return ramp + n * shortest, ramp + n * plan.settle["max_dwell_s"]
    d = n * float(plan.dwell_s or 0.0)
    return ramp + d, ramp + d


def sample_lines(plan: Plan, sweeps: Iterable[SampleSweep], above: Iterable[str] = ()) -> list[str]:
    """One line per sample: highest bias, current limit, ramp rate, expected duration."""
    above = set(above)
    out = []
    for sw in sweeps:
        top = max((abs(p.bias_V) for p in sw.points), default=0.0)
        if sw.adaptive is not None:
            top = max(top, abs(sw.adaptive.top_V))
        lo, hi = expected_duration_s(plan, sw)
        dur = format_duration(lo) if hi <= lo else f"{format_duration(lo)} .. {format_duration(hi)}"
        more = " (adaptive: more passes may follow)" if sw.adaptive is not None else ""
        npts = f"at least {len(sw.adaptive.even_loop())}" if sw.adaptive is not None else len(sw.points)
        warn = " ABOVE RATING" if sw.sample.sample_id in above else ""
        out.append(
            f"{sw.sample.sample_id} ({sw.part.id}, rated {sw.part.rated_V:g} V, channel "
            f"{sw.sample.channel}): up to {top:g} V{warn}, current limit {plan.current_limit_A:g} A, "
            f"ramp {plan.max_ramp_V_per_s:g} V/s, {npts} points, about {dur}{more}")
    return out


def summary_record(plan: Plan, sweeps: Iterable[SampleSweep], above: Iterable[str] = ()) -> list[dict]:
    """The same, as plain data for run.json."""
    above = set(above)
    out = []
    for sw in sweeps:
        lo, hi = expected_duration_s(plan, sw)
        top = max((abs(p.bias_V) for p in sw.points), default=0.0)
        if sw.adaptive is not None:
            top = max(top, abs(sw.adaptive.top_V))
        out.append({"sample_id": sw.sample.sample_id, "max_abs_bias_V": top,
                    "rated_V": sw.part.rated_V, "above_rated": sw.sample.sample_id in above,
                    "current_limit_A": plan.current_limit_A,
                    "max_ramp_V_per_s": plan.max_ramp_V_per_s,
                    "expected_min_s": lo, "expected_max_s": hi})
    return out


def supply_final_state(supply: Any) -> dict:
    """What the supply reports after the shutdown: output, set and measured voltage (None
    where it did not answer)."""
    state: dict[str, Any] = {}
    for key, attr in (("output_on", "output_on"), ("voltage_set_V", "voltage_V"),
                      ("voltage_meas_V", "measured_voltage_V")):
        try:
            state[key] = getattr(supply, attr)
        except Exception as exc:  # a dead link: say so, the shutdown already did what it could
            state[key] = None
            state.setdefault("error", " ".join(str(exc).split()) or type(exc).__name__)
    return state


def final_state_line(state: dict) -> str:
    out = state.get("output_on")
    words = "output off" if out is False else "output ON" if out else "output unknown"
    v = state.get("voltage_set_V")
    m = state.get("voltage_meas_V")
    text = f"supply final state: {words}, set {v:g} V" if isinstance(v, (int, float)) else \
        f"supply final state: {words}, set voltage unknown"
    if isinstance(m, (int, float)):
        text += f", measured {m:g} V"
    if state.get("error"):
        text += f" (no answer: {state['error']})"
    return text
