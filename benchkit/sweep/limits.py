"""The plan's limits against the bench's own ranges, and the above-rating consent, checked
before any run directory is created or any instrument opened.

Why here and not in the driver: the driver refuses an out-of-range setting too, but only once
the instruments are open and the run directory exists, which leaves a run that cannot be
resumed into anything useful. The ranges come from the instrument profiles named by the
bench (the supply's `voltage_V` and `current_limit_A` settings, the scanner's `[route]`
channels), so a new instrument needs a profile, not code.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Iterable

from benchkit.errors import UserError
from benchkit.sweep.plan import Plan, SampleSweep


@dataclass(frozen=True)
class BenchRanges:
    """What the bench's instruments can be set to (None where a profile does not say)."""

    voltage_V: tuple[float, float] | None
    current_limit_A: tuple[float, float] | None
    channels: tuple[int, int] | None


def bench_ranges(src: Any) -> BenchRanges:
    """The ranges of a BenchSource's supply and scanner, from their profiles."""
    from instruments.drivers import load_profile
    from instruments.drivers.errors import ProfileError

    bench = getattr(src, "bench", None)
    if bench is not None:
        try:
            scanner = load_profile(bench.instruments["scanner"].profile, kind="scanner")
            if getattr(bench, "bias_source", "supply") == "meter":   # the meter's internal bias
                meter = load_profile(bench.instruments["meter"].profile, kind="lcr-meter")
                return BenchRanges(_setting_range(meter, "bias_V"), None, _channel_range(scanner))
            supply = load_profile(bench.instruments["supply"].profile, kind="dc-supply")
        except ProfileError as exc:
            raise UserError(" ".join(str(exc).split())) from None
    else:  # open drivers: their profiles
        inst = getattr(src, "instruments", None)
        supply = getattr(getattr(inst, "supply", None), "profile", None)
        scanner = getattr(getattr(inst, "scanner", None), "profile", None)
    return BenchRanges(_setting_range(supply, "voltage_V"), _setting_range(supply, "current_limit_A"),
                       _channel_range(scanner))


def _setting_range(profile, name) -> tuple[float, float] | None:
    spec = getattr(profile, "settings", {}).get(name) if profile is not None else None
    if spec is None or spec.min is None or spec.max is None:
        return None
    return float(spec.min), float(spec.max)


def _channel_range(profile) -> tuple[int, int] | None:
    opts = getattr(profile, "options", None) or {}
    lo, hi = opts.get("first_channel"), opts.get("last_channel")
    return None if lo is None or hi is None else (int(lo), int(hi))


def check_bench_limits(plan: Plan, sweeps: Iterable[SampleSweep], ranges: BenchRanges) -> None:
    """The current limit within the supply's range, each channel within the scanner's."""
    if ranges.current_limit_A is not None:
        lo, hi = ranges.current_limit_A
        i = plan.current_limit_A
        if not lo <= i <= hi:
            raise UserError(f"{plan.source}: field 'limits.current_limit_A': {i:g} A is outside the "
                            f"supply's range {lo:g} .. {hi:g} A (its profile); choose a limit in it")
    if ranges.channels is not None:
        lo, hi = ranges.channels
        for sw in sweeps:
            ch = sw.sample.channel
            if not lo <= ch <= hi:
                raise UserError(f"{plan.source}: sample {sw.sample.sample_id}: channel {ch} is outside "
                                f"the scanner's channels {lo} .. {hi} (its profile); use one of them")


def above_rated(sweeps: Iterable[SampleSweep]) -> list[tuple[SampleSweep, float]]:
    """The samples the plan takes above their part's rated voltage, with their highest bias."""
    out = []
    for sw in sweeps:
        top = max((abs(p.bias_V) for p in sw.points), default=0.0)
        if sw.adaptive is not None:
            top = max(top, abs(getattr(sw.adaptive, "top_V", top)))
        if top > sw.part.rated_V * (1 + 1e-9):
            out.append((sw, top))
    return out


def check_above_rated_consent(plan: Plan, sweeps: Iterable[SampleSweep], confirmed: bool) -> list[str]:
    """Going above rating needs the plan's flag (checked in plan.check_sample) and the
    operator's consent (a terminal confirmation or --yes); returns the sample ids affected."""
    over = above_rated(sweeps)
    if over and not confirmed:
        sw, top = over[0]
        raise UserError(
            f"{plan.source}: sample {sw.sample.sample_id}: {top:g} V is above the rated "
            f"{sw.part.rated_V:g} V of part {sw.part.id} (limits.allow_above_rated = true); "
            "confirm at the terminal or pass --yes to go above rating")
    return [sw.sample.sample_id for sw, _ in over]
