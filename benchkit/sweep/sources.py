"""Where a run's instruments come from: a bench file, an embedded simulated bench, or drivers
already open; and the voltage range the bias source declares (checked before any output)."""

from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Any

from benchkit.errors import UserError
from benchkit.sweep.benchfile import BenchFile, Instruments, load_bench, open_instruments, parse_bench_text


class BenchSource:
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
        if self.bench is None:
            return _range_of(self.instruments.supply) if self.instruments else None
        if self.bench.bias_source == "meter":
            return meter_bias_range(self.bench.instruments["meter"].profile)
        return supply_profile_range(self.bench.instruments["supply"].profile)

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


def meter_bias_range(profile: str) -> tuple[float, float] | None:
    """The internal bias range a meter profile declares (setting bias_V): the bias limits."""
    from instruments.drivers import load_profile
    from instruments.drivers.errors import ProfileError

    try:
        prof = load_profile(profile, kind="lcr-meter")
    except ProfileError as exc:
        raise UserError(str(exc)) from None
    spec = prof.settings.get("bias_V")
    if spec is None or spec.min is None or spec.max is None:
        return None
    return float(spec.min), float(spec.max)


def _range_of(supply) -> tuple[float, float] | None:
    rng = getattr(supply, "voltage_range_V", None)  # BiasSupply: from its profile
    if rng is None or None in rng:
        return None
    return float(rng[0]), float(rng[1])
