"""`benchkit measure`: run a bias-sweep plan on a bench (or the embedded simulated bench).

    benchkit measure --bench BENCH.toml --plan PLAN.toml --out RUN_DIR
    benchkit measure --sim [--lot] [--virtual-clock [--clock-speed K]] --plan PLAN.toml --out RUN_DIR
    benchkit measure --resume RUN_DIR

Exit 0 when the plan completed, 1 when the run was aborted (points so far are kept, the
supply is at 0 V with its output off), 2 for bad input before anything ran.
"""

from __future__ import annotations

import sys
from pathlib import Path

from benchkit.cli import SAFETY_NOTE
from benchkit.errors import UserError


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "measure",
        help="sweep DC bias over samples and log C, D, Rs per point",
        description=(
            "Measure capacitance under DC bias: for each sample, ramp the bias through the "
            "plan's points, dwell, read the meter, and write each point to RUN_DIR/points.csv "
            "before the next step; run.json records the plan, instruments, conditions and how "
            "the run ended. Ctrl-C or SIGTERM ramps down, switches the output off and saves."
        ),
        epilog=SAFETY_NOTE,
    )
    where = p.add_argument_group("bench (one of)")
    where.add_argument("--bench", type=Path, metavar="BENCH.toml", help="bench file: instrument addresses and fixture channels")
    where.add_argument("--sim", action="store_true", help="use the embedded simulated bench (demo parts and fixture)")
    p.add_argument("--plan", type=Path, metavar="PLAN.toml", help="sweep plan (see data/plans/demo.toml)")
    p.add_argument("--out", type=Path, metavar="RUN_DIR", help="new run directory to create")
    p.add_argument("--resume", type=Path, metavar="RUN_DIR", help="continue an interrupted run from its last complete point")
    p.add_argument("--yes", action="store_true",
                   help="agree beforehand to a plan that goes above a part's rated voltage "
                        "(limits.allow_above_rated = true); otherwise asked at the terminal")
    p.add_argument("--parts", type=Path, metavar="FILE", help="parts catalogue (rated voltage, class, nominal C); default: the demo parts")
    p.add_argument("--io-timeout-s", type=float, metavar="S", help="instrument reply timeout in seconds (default: the profile's, else 5)")
    sim = p.add_argument_group("simulated bench (with --sim)")
    sim.add_argument("--lot", action="store_true", help="put the demo lot on the fixture instead of the demo parts")
    sim.add_argument("--fixture", type=Path, metavar="FIXTURE.toml",
                     help="put these demo samples on the fixture (e.g. data/fixture-temperature.toml)")
    sim.add_argument("--virtual-clock", action="store_true", help="run on a virtual clock: dwell and ramps take no real time")
    sim.add_argument("--clock-speed", type=float, metavar="K", help="with --virtual-clock: each clock second also waits 1/K real seconds")
    sim.add_argument("--seed", type=int, default=0, help="seed of the simulated noise (default 0)")
    sim.add_argument("--sim-dialect", choices=("generic", "alt"), default="generic",
                     help="the simulated meter's dialect: alt has a status field, level control and "
                          "an internal bias (its bench names no supply); see instruments/COMMANDS.md")
    sim.add_argument("--fault", action="append", default=[], metavar="SPEC", help="inject a simulated fault, e.g. timeout:after=40 (repeatable)")
    p.set_defaults(func=run)


def _check_args(args) -> None:
    if args.resume is not None:
        extra = [n for n, v in (("--out", args.out), ("--sim", args.sim), ("--lot", args.lot),
                                ("--virtual-clock", args.virtual_clock), ("--fault", args.fault),
                                ("--parts", args.parts), ("--fixture", args.fixture)) if v]
        if extra:
            raise UserError(f"--resume takes its settings from RUN_DIR/run.json; drop {', '.join(extra)}")
        return
    if args.sim == (args.bench is not None):
        raise UserError("give exactly one of --bench BENCH.toml or --sim")
    if args.plan is None or args.out is None:
        raise UserError("--plan PLAN.toml and --out RUN_DIR are needed (or --resume RUN_DIR)")
    if not args.sim:
        for name, v in (("--lot", args.lot), ("--virtual-clock", args.virtual_clock), ("--fault", args.fault),
                        ("--fixture", args.fixture), ("--sim-dialect", args.sim_dialect != "generic")):
            if v:
                raise UserError(
                    f"{name} works with --sim only"
                    + ("; a virtual clock would ramp a real bench faster than max_ramp_V_per_s" if name == "--virtual-clock" else "")
                )
    if args.clock_speed is not None and (not args.virtual_clock or not args.clock_speed > 0):
        raise UserError("--clock-speed K needs --virtual-clock and K > 0")
    if args.io_timeout_s is not None and not args.io_timeout_s > 0:
        raise UserError("--io-timeout-s must be a positive number of seconds")


def _make_clock(virtual: bool, speed: float | None):
    from instruments.clock import RealClock, VirtualClock

    return VirtualClock(speed=speed) if virtual else RealClock()


def _make_sim(lot: bool, seed: int, faults: list[str], clock, fixture: str | None = None,
              dialect: str = "generic"):
    from benchkit.commands import sim as sim_command
    from instruments.sim import Fault, FaultSpecError, SimBenchError

    try:
        parsed = [Fault.parse(f) for f in faults]
        if fixture is not None:  # the demo parts on another fixture (e.g. the chamber's)
            from benchkit.catalogue import DEMO_PARTS, PartsFileError, load_fixture, load_parts

            try:
                parts = load_parts(DEMO_PARTS)
                slots = load_fixture(fixture, parts)
            except PartsFileError as exc:
                raise UserError(str(exc)) from None
            return sim_command.sim_bench(parts, slots, clock=clock, faults=parsed, seed=seed,
                                           dialect=dialect)
        return sim_command.demo_bench(clock=clock, faults=parsed, seed=seed, lot=lot, dialect=dialect)
    except (FaultSpecError, SimBenchError) as exc:
        raise UserError(f"--sim: {exc}") from None


def run(args) -> int:
    _check_args(args)
    from benchkit.sweep.progress import Progress
    from benchkit import sweep

    progress = Progress(stream=sys.stderr)
    if args.resume is not None:
        return _resume(args, progress)

    from benchkit.catalogue import load_catalogue
    from benchkit.sweep.plan import load_plan

    parts = load_catalogue(args.parts)
    plan = load_plan(args.plan, parts)
    clock = _make_clock(args.virtual_clock, args.clock_speed)
    record = {
        "parts_file": str(args.parts.resolve()) if args.parts else None,
        "sim": {"lot": args.lot, "seed": args.seed, "faults": list(args.fault), "dialect": args.sim_dialect,
                "fixture": str(args.fixture.resolve()) if args.fixture else None,
                "virtual_clock": args.virtual_clock, "clock_speed": args.clock_speed} if args.sim else None,
    }
    if args.sim:
        if args.lot and args.fixture:
            raise UserError("give --lot or --fixture, not both")
        bench = _make_sim(args.lot, args.seed, args.fault, clock,
                          str(args.fixture) if args.fixture else None, args.sim_dialect)
        with bench:
            result = sweep.run_sweep(bench, plan, args.out, clock, progress, parts=parts,
                                     io_timeout_s=args.io_timeout_s, extra_record=record,
                                     confirm_above_rated=_confirmation(args))
    else:
        from benchkit.sweep.benchfile import load_bench

        bench_file = load_bench(args.bench)
        result = sweep.run_sweep(bench_file, plan, args.out, clock, progress, parts=parts,
                                 io_timeout_s=args.io_timeout_s, extra_record=record,
                                 before_output=_print_safety_note,
                                 confirm_above_rated=_confirmation(args))
    return _report(result)


def _resume(args, progress) -> int:
    from benchkit import sweep
    from benchkit.sweep.benchfile import load_bench
    from benchkit.sweep.plan import load_plan
    from benchkit.sweep.runlog import read_run

    meta = read_run(args.resume)
    plan = load_plan(args.plan) if args.plan is not None else None
    sim = meta.get("sim")
    if sim:
        if args.bench is not None:
            raise UserError(f"{args.resume}: this run used the simulated bench (--sim); resume it without --bench")
        clock = _make_clock(bool(sim.get("virtual_clock")), sim.get("clock_speed"))
        bench = _make_sim(bool(sim.get("lot")), int(sim.get("seed") or 0), [], clock,  # faults are not re-armed
                          sim.get("fixture"), sim.get("dialect") or "generic")
        with bench:
            result = sweep.resume_sweep(args.resume, bench, clock, progress, plan=plan, io_timeout_s=args.io_timeout_s,
                                        confirm_above_rated=_confirmation(args))
    else:
        bench_file = load_bench(args.bench) if args.bench is not None else sweep.stored_bench(meta)
        result = sweep.resume_sweep(args.resume, bench_file, None, progress, plan=plan,
                                    io_timeout_s=args.io_timeout_s, before_output=_print_safety_note,
                                    confirm_above_rated=_confirmation(args))
    return _report(result)


def _confirmation(args):
    """--yes, or a question at the terminal; no terminal and no --yes means no."""
    if args.yes:
        return True
    if not (sys.stdin.isatty() and sys.stderr.isatty()):
        return False

    def ask(lines: list[str]) -> bool:
        for line in lines:
            print(f"benchkit measure: {line}", file=sys.stderr)
        print("benchkit measure: the plan goes ABOVE the rated voltage of the samples marked; "
              "type 'yes' to go on: ", end="", file=sys.stderr, flush=True)
        try:
            return sys.stdin.readline().strip().lower() == "yes"
        except (OSError, KeyboardInterrupt):
            return False

    return ask


def _print_safety_note() -> None:
    print(f"benchkit measure: CAUTION: {SAFETY_NOTE}", file=sys.stderr, flush=True)


def _report(result) -> int:
    if result.status == "complete":
        print(f"run {result.run_id} complete: {result.n_points} points in {result.run_dir / 'points.csv'} "
              f"(sha256 {result.points_sha256})")
    else:
        print(f"benchkit: run {result.run_id} aborted: {result.reason}", file=sys.stderr)
        if result.supply_safe:  # said only when the supply's own read-back confirmed it
            print("benchkit: the bias supply is at 0 V with its output off", file=sys.stderr)
        print(f"benchkit: {result.n_points} of {result.n_planned} points saved in {result.run_dir}; "
              f"continue with: benchkit measure --resume {result.run_dir}", file=sys.stderr)
    return result.exit_code


__all__ = ["register", "run"]
