"""`benchkit sim`: run the simulated bench in the foreground until Ctrl-C or SIGTERM.

Prints one line per instrument (role and VISA resource string) so that the resources can be
pasted into a bench file, or writes that bench file itself with --bench-file.

This module is also the one bridge from the catalogue to the simulated bench: the bench has
no catalogue of its own, so `simulated_parts` hands it each part's nominal value, rating,
class code, reference conditions and raw `[part.sim]` table, and `sim_bench` / `demo_bench`
build a bench from catalogue parts and fixture slots for the other entry points (measure,
the demo, the benchmarks, the tests).
"""

from __future__ import annotations

import signal
import sys
import threading
from pathlib import Path
from typing import Any, Mapping, Sequence

from benchkit.atomic import write_text_atomic
from benchkit.catalogue import (
    DEMO_FIXTURE, DEMO_LOT, DEMO_PARTS, PartsFileError, load_fixture, load_lot, load_parts,
)
from benchkit.cli import SAFETY_NOTE
from benchkit.errors import UserError


def register(subparsers) -> None:
    parser = subparsers.add_parser(
        "sim",
        help="run the simulated bench (meter, supply, scanner, thermometer) over TCP",
        description="Serve a simulated LCR meter, DC bias supply, channel scanner and "
                    "thermometer on local TCP ports, with simulated parts on the fixture. "
                    "Stops on Ctrl-C or SIGTERM.",
        epilog=SAFETY_NOTE,
    )
    parser.add_argument("--parts", type=Path, metavar="FILE",
                        help="parts file (TOML); default: the demo catalogue")
    parser.add_argument("--fixture", type=Path, metavar="FILE",
                        help="fixture file (TOML), or with --lot a lot file; default: the demo "
                             "fixture (or the demo lot)")
    parser.add_argument("--lot", action="store_true",
                        help="put an incoming lot on the fixture instead of one sample per part")
    parser.add_argument("--port", type=int, default=0, metavar="N",
                        help="base port: meter N, supply N+1, scanner N+2, thermometer N+3; "
                             "0 picks free ports (default)")
    parser.add_argument("--host", default="127.0.0.1",
                        help="address to listen on (default 127.0.0.1: this machine only)")
    parser.add_argument("--bench-file", type=Path, metavar="BENCH.toml",
                        help="write a bench file for `benchkit measure --bench`")
    parser.add_argument("--fault", action="append", default=[], metavar="KIND[:after=N]",
                        help="inject a fault (timeout, drop, garble, error, late, overload, "
                             "current-limit, temp-drift), e.g. drop:after=40; repeatable")
    parser.add_argument("--virtual-clock", action="store_true",
                        help="bench time moves only by the meter's measurement time "
                             "(0.1 s per reading) instead of real time")
    parser.add_argument("--seed", type=int, default=0, help="seed of the simulated noise")
    parser.add_argument("--dialect", choices=("generic", "alt"), default="generic",
                        help="the meter's dialect: alt has a status field, level control and an "
                             "internal bias, and its bench file names no supply (COMMANDS.md)")
    parser.set_defaults(func=run)


def simulated_parts(parts: Mapping[str, Any]) -> dict:
    """{part id: SimPart} for the parts that carry a `[part.sim]` table.

    A table the simulator cannot use is a PartsFileError naming the parts file and entry."""
    from benchkit.catalogue.codes import parse_class_code
    from benchkit.catalogue.conditions import standard_conditions
    from instruments.sim.simpart import ClassBand, SimPartError, sim_part

    out = {}
    for pid, spec in parts.items():
        if spec.sim is None:
            continue
        code = parse_class_code(spec.class_code)
        if code.dielectric_class == 2:
            band = ClassBand(code.code, 2, code.low_temp_C, code.high_temp_C,
                             -code.change_minus_pct, code.change_plus_pct)
        else:
            band = ClassBand(code.code, 1, code.low_temp_C, code.high_temp_C,
                             tc_ppm_per_K=code.tc_ppm_per_K, tc_tol_ppm_per_K=code.tc_tol_ppm_per_K)
        ref = standard_conditions(spec.class_code, spec.nominal_C_F)
        try:
            out[pid] = sim_part(pid, spec.nominal_C_F, spec.rated_V, band, ref.freq_Hz,
                                ref.ac_level_Vrms, spec.sim, spec.where or f"part {pid}")
        except SimPartError as exc:
            raise PartsFileError(str(exc)) from None
    return out


def sim_bench(parts: Mapping[str, Any], slots: Sequence[Any], **kwargs):
    """A SimBench (not started) of catalogue parts on fixture or lot slots."""
    from instruments.sim.bench import SimBench

    return SimBench(simulated_parts(parts), slots, **kwargs)


def demo_bench(lot: bool = False, **kwargs):
    """The embedded default: the demo parts on the demo fixture, or the demo lot."""
    parts = load_parts(DEMO_PARTS)
    slots = load_lot(DEMO_LOT, parts) if lot else load_fixture(DEMO_FIXTURE, parts)
    return sim_bench(parts, slots, **kwargs)


def _build_bench(args):
    """Check every input first, then load the physics (numpy, scipy) and build the bench."""
    from instruments.clock import RealClock, VirtualClock
    from instruments.sim.faults import Fault, FaultSpecError

    try:
        faults = [Fault.parse(spec) for spec in args.fault]
    except FaultSpecError as exc:
        raise UserError(f"--fault: {exc}") from None
    if not (args.port == 0 or 1 <= args.port <= 65531):
        raise UserError(f"--port {args.port}: use 0 (free ports) or a base port 1 .. 65531 "
                        "(five instruments on consecutive ports)")
    try:
        parts = load_parts(args.parts or DEMO_PARTS)
        if args.lot:
            slots = load_lot(args.fixture or DEMO_LOT, parts)
        else:
            slots = load_fixture(args.fixture or DEMO_FIXTURE, parts)
        simulated = simulated_parts(parts)
    except PartsFileError as exc:
        raise UserError(str(exc)) from None
    from instruments.sim.bench import SimBench, SimBenchError

    clock = VirtualClock() if args.virtual_clock else RealClock()
    try:
        return SimBench(simulated, slots, clock=clock, host=args.host, base_port=args.port,
                        faults=faults, seed=args.seed, dialect=args.dialect)
    except SimBenchError as exc:
        raise UserError(str(exc)) from None


def run(args) -> int:
    bench = _build_bench(args)
    from instruments.sim.bench import SimBenchError

    stop = threading.Event()
    previous = {}
    try:
        for signum in (signal.SIGINT, signal.SIGTERM):
            previous[signum] = signal.signal(signum, lambda *_: stop.set())
    except ValueError:  # not the main thread (e.g. called from a test thread): no handlers
        pass
    try:
        try:
            bench.start()
        except SimBenchError as exc:
            raise UserError(str(exc)) from None
        try:
            for role, resource in bench.resources.items():
                print(f"{role:<12} {resource}")
            if args.bench_file:
                try:
                    write_text_atomic(args.bench_file, bench.bench_file_text())
                except OSError as exc:
                    raise UserError(f"--bench-file {args.bench_file}: cannot write: "
                                    f"{exc.strerror or exc}; check the directory") from None
                print(f"bench file   {args.bench_file}")
            if args.host not in ("127.0.0.1", "localhost", "::1"):
                print(f"benchkit sim: listening on {args.host}: other machines can reach it",
                      file=sys.stderr)
            print("benchkit sim: running; Ctrl-C or SIGTERM stops it", file=sys.stderr)
            sys.stdout.flush()
            while not stop.wait(0.5):
                pass
        finally:
            bench.stop()
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
    print("benchkit sim: stopped", file=sys.stderr)
    return 0


__all__ = ["demo_bench", "register", "run", "sim_bench", "simulated_parts"]
