"""SimBench: the simulated bench in-process, five instruments on five TCP ports.

Why in-process with real sockets: the drivers and the sweep talk to it through pyvisa and
TCP exactly as to hardware, while a test can still read the truth (the supply's real state,
the part's settled capacitance) and inject faults at a chosen command.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from instruments.clock import RealClock
from instruments.roles import ALL_ROLES, DEFAULT_PROFILES
from instruments.sim.chamber import ChamberSim
from instruments.sim.dc_supply import DCSupplySim
from instruments.sim.faults import Fault, FaultPlan
from instruments.sim.fixture import BiasFixture, FixtureError, Wiring
from instruments.sim.lcr_meter import LCRMeterSim
from instruments.sim.scanner import ScannerSim
from instruments.sim.server import InstrumentServer
from instruments.sim.thermometer import ThermometerSim

ROLE_ORDER = ALL_ROLES
PROFILES = DEFAULT_PROFILES
# The meter's dialects (COMMANDS.md): "generic" speaks the generic profiles, "alt" spells
# everything otherwise, answers a status field, has level control and an internal bias.
DIALECTS = ("generic", "alt")
ALT_METER_PROFILE = Path(__file__).resolve().parent / "profiles" / "sim-alt-lcr.toml"


def _meter_class(dialect: str):
    if dialect == "alt":
        from instruments.sim.lcr_meter_alt import LCRMeterAltSim
        return LCRMeterAltSim
    return LCRMeterSim


class SimBenchError(ValueError):
    """The bench cannot be built or started as asked; the message says what to change."""


def _toml_str(text: str) -> str:
    # A JSON string of printable text is a valid TOML basic string.
    return json.dumps(str(text), ensure_ascii=True)


class SimBench:
    """Meter, supply, scanner, thermometer and chamber over one bias fixture, on 127.0.0.1.

    parts: {part_id: SimPart} (instruments.sim.simpart), handed over by whoever starts the
    bench; fixture: slots with channel, sample_id, part_id (and for a lot's samples C_scale,
    field_scale, hours_since_heat_h), one sample per scanner channel.
    base_port N: meter N, supply N+1, scanner N+2, thermometer N+3, chamber N+4; 0 = a free
    port each. The chamber's air, the fixture and the parts follow instruments/sim/thermal.py;
    the physics is read at the parts' temperature, the thermometer at the fixture's.
    Faults: see instruments.sim.faults; those given here are armed when the bench starts.

    Timing: a pyvisa write returns before the bench has executed it, and writes to two
    instruments are not ordered. With a VirtualClock, sync (any query, e.g. *OPC?) before
    sleeping on the clock or reading an oracle such as supply_state(), as on real hardware.
    stop() closes the ports and connections but leaves the physics as it is, so that
    supply_state() still tells what the sweep left behind.
    """

    def __init__(self, parts: Mapping[str, object], fixture: Sequence[object], clock=None,
                 host: str = "127.0.0.1", base_port: int = 0, faults: Iterable[Fault] = (),
                 seed: int = 0, temp_C: float = 25.0, wiring: Wiring = Wiring(),
                 dialect: str = "generic"):
        from instruments.sim.physics import SimulatedPart  # physics imports scipy: load late

        self.clock = clock if clock is not None else RealClock()
        self.host = host
        last = 65535 - (len(ROLE_ORDER) - 1)
        if not (base_port == 0 or 1 <= base_port <= last):
            raise SimBenchError(f"base port {base_port} out of range; use 0 (free ports) or "
                                f"1 .. {last}")
        self.base_port = base_port
        self.seed = seed
        self.slots = list(fixture)
        seeds = np.random.SeedSequence(seed).spawn(len(self.slots) + 1)
        factories = {}
        seen: set[int] = set()
        for slot, seq in zip(self.slots, seeds):
            channel = getattr(slot, "channel")
            if channel in seen:
                raise SimBenchError(f"fixture: channel {channel} holds two samples; one per channel")
            seen.add(channel)
            spec = parts.get(slot.part_id)
            if spec is None:
                raise SimBenchError(f"fixture: channel {channel} ({slot.sample_id}) names part "
                                    f"{slot.part_id!r}, which the parts file does not define")
            if getattr(spec, "sim", None) is None:
                raise SimBenchError(f"part {spec.id}: no [part.sim] table, so the simulated "
                                    "bench cannot model it; add its physics or leave it out")
            rng = np.random.default_rng(seq)
            factories[channel] = (lambda time, spec=spec, rng=rng, slot=slot:
                                  SimulatedPart(spec, time, rng, sample=slot))
        try:
            self.fixture = BiasFixture(self.clock, factories, wiring=wiring, temp_C=temp_C)
        except FixtureError as exc:
            raise SimBenchError(f"fixture: {exc}") from None
        tag = f"{seed % 10000:04d}"
        if dialect not in DIALECTS:
            raise SimBenchError(f"meter dialect {dialect!r} unknown; one of "
                                f"{', '.join(DIALECTS)}")
        self.dialect = dialect
        self.meter = _meter_class(dialect)(f"SM{tag}-01", self.fixture)
        self.supply = DCSupplySim(f"SM{tag}-02", self.fixture)
        self.scanner = ScannerSim(f"SM{tag}-03", self.fixture)
        self.thermometer = ThermometerSim(f"SM{tag}-04", self.fixture,
                                          np.random.default_rng(seeds[-1]))
        self.chamber = ChamberSim(f"SM{tag}-05", self.fixture.chamber)
        self.instruments = {"meter": self.meter, "supply": self.supply,
                            "scanner": self.scanner, "thermometer": self.thermometer,
                            "chamber": self.chamber}
        self.faults = FaultPlan({
            "error": lambda f: self.instruments[f.role].errors.push(f.code, "injected fault"),
            "overload": lambda f: self.meter.arm_overload(f.count),
            "current-limit": lambda f: self.fixture.set_fault_limit(f.limit_A),
            "temp-drift": lambda f: self.fixture.start_temp_drift(f.rate_C_per_min),
            "refuse": lambda f: self.chamber.arm_refusal(f.count),
            "unstable": lambda f: self.fixture.chamber.start_hunting(f.amplitude_C),
        })
        self._initial_faults = list(faults)
        self._servers: dict[str, InstrumentServer] = {}

    # ------------------------------------------------------------ construction helpers

    # ------------------------------------------------------------ life cycle

    def start(self) -> "SimBench":
        """Listen on the five ports; on any failure nothing is left open."""
        if self._servers:
            return self
        try:
            for index, role in enumerate(ROLE_ORDER):
                port = self.base_port + index if self.base_port else 0
                server = InstrumentServer(self.instruments[role], self.host, port, self.faults)
                try:
                    server.start()
                except OSError as exc:
                    raise SimBenchError(
                        f"cannot listen on {self.host}:{port} for the {role}: "
                        f"{exc.strerror or exc}; pick another base port (or 0 for free ports)"
                    ) from None
                self._servers[role] = server
        except BaseException:
            self.stop()
            raise
        for fault in self._initial_faults:
            self.faults.arm(fault)
        self._initial_faults = []
        return self

    def stop(self) -> None:
        """Close the listeners and every client connection. The physics state is kept as is."""
        servers, self._servers = self._servers, {}
        for server in servers.values():
            server.stop()

    def __enter__(self) -> "SimBench":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    @property
    def running(self) -> bool:
        return bool(self._servers)

    # ------------------------------------------------------------ what a client needs

    @property
    def resources(self) -> dict[str, str]:
        """{role: VISA resource string}; the bench must be started."""
        if not self._servers:
            raise SimBenchError("the simulated bench is not running; start it first "
                                "(use it as a context manager or call start())")
        return {role: self._servers[role].resource for role in ROLE_ORDER}

    @property
    def channels(self) -> list[dict]:
        """[{channel, sample_id, part_id, hours_since_heat_h}] in channel order (age: now)."""
        out = []
        for s in sorted(self.slots, key=lambda s: s.channel):
            age = getattr(self.fixture.part(s.channel), "hours_since_heat_h", None)
            out.append({"channel": s.channel, "sample_id": s.sample_id, "part_id": s.part_id,
                        "hours_since_heat_h": age() if callable(age) else None})
        return out

    def bench_file_text(self) -> str:
        """The bench file (TOML) that points `benchkit measure --bench` at this bench."""
        lines = ["# Bench file of a simulated bench (benchkit sim). Roles, resources, profiles,",
                 "# and which sample sits on which scanner channel.", ""]
        for role, resource in self.resources.items():
            profile = PROFILES[role]
            if self.dialect == "alt" and role == "supply":
                lines += ["# no [instrument.supply]: the meter's internal bias biases the part", ""]
                continue
            if self.dialect == "alt" and role == "meter":
                profile = str(ALT_METER_PROFILE)
            lines += [f"[instrument.{role}]", f"resource = {_toml_str(resource)}",
                      f"profile = {_toml_str(profile)}", ""]
        for entry in self.channels:
            lines += ["[[channel]]", f"channel = {entry['channel']}",
                      f"sample_id = {_toml_str(entry['sample_id'])}",
                      f"part_id = {_toml_str(entry['part_id'])}"]
            if entry["hours_since_heat_h"] is not None:
                lines.append(f"hours_since_heat_h = {entry['hours_since_heat_h']:.6g}")
            lines.append("")
        return "\n".join(lines)

    # ------------------------------------------------------------ test oracles and knobs

    def supply_state(self) -> dict:
        """{"set_V", "output_on", "terminal_V"}: the supply as it really is now."""
        return self.fixture.supply_state()

    def part_voltage_V(self, channel: int) -> float:
        """The DC voltage across the part on `channel` now (charging included)."""
        self._check_channel(channel)
        return self.fixture.part_voltage_V(channel)

    def true_settled_C_F(self, channel: int, bias_V: float, branch: str = "rising",
                         freq_Hz: float = 1e3, ac_level_Vrms: float | None = None,
                         temp_C: float = 25.0, turn_V: float | None = None,
                         function: str = "CPD") -> float:
        """The truth: noise-free, settled C of the part on `channel` (see physics.py), Cp for
        function CPD and Cs for CSD/CSRS; turn_V: where a falling branch turned (None: from
        far enough out)."""
        self._check_channel(channel)
        with self.fixture.lock:
            return self.fixture.part(channel).true_settled_C_F(
                bias_V, branch=branch, freq_Hz=freq_Hz, ac_level_Vrms=ac_level_Vrms,
                temp_C=temp_C, turn_V=turn_V, function=function)

    def set_temperature(self, temp_C: float) -> None:
        """Air, fixture and parts at temp_C at once, stable (a test knob; the chamber's own
        set point ramps instead)."""
        self.fixture.set_temperature(temp_C)

    def temperature_C(self) -> float:
        """The parts' temperature now (what the physics uses), degC."""
        return self.fixture.temp_C()

    def chamber_state(self) -> dict:
        """{"setpoint_C", "air_C", "fixture_C", "part_C", "state"}: the chamber as it is now."""
        th = self.fixture.chamber
        with th.lock:
            return {"setpoint_C": th.target_C, "air_C": th.air_C(),
                    "fixture_C": th.fixture_C(), "part_C": th.part_C(), "state": th.state()}

    def inject(self, fault: Fault | str) -> Fault:
        """Arm a fault now; `after` counts messages to its instrument from this moment."""
        if isinstance(fault, str):
            fault = Fault.parse(fault)
        self.faults.arm(fault)
        return fault

    def _check_channel(self, channel: int) -> None:
        if channel not in self.fixture.channels:
            raise SimBenchError(f"no sample on channel {channel}; the fixture has channels "
                                f"{self.fixture.channels}")


__all__ = ["SimBench", "SimBenchError", "PROFILES", "ROLE_ORDER"]
