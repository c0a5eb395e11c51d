"""What the engine adds to its own instrument exchanges, like with like, in one run.

Three ways of making the same exchanges with the same simulated instruments (pyvisa with
the pyvisa-py backend over loopback TCP, a virtual clock so that no dwell, ramp or
measurement time is waited for and what is left is software and link):

- engine: a uniform sweep (benchkit.sweep.run_sweep), every exchange recorded by a spy on
  the sessions' raw write and read, and the wall time taken between the first and the
  last saved point;
- bare: the recorded exchanges of those points replayed through pyvisa resources opened
  directly, by the same pyvisa calls the engine's sessions make (the VISA library's write
  and read on the resource's session, nothing else), plus one row per point written and
  fsync'd;
  the engine's sleeps on the bench clock (ramp pauses, dwell) are replayed in their place
  too, as the simulated bench integrates its physics over the clock time that passes (its
  stand-in for the instruments' own time: the same work for every contender);
- pymeasure: a PyMeasure procedure (run by its Worker, results written by its Recorder)
  making the same exchanges through PyMeasure instruments and emitting one result per
  point, its Recorder made to fsync each row; timed from start to the last row on disk.
  PyMeasure is a benchmark-only dependency (the `bench` extra); without it this part is
  skipped with the reason.

Rounds alternate the three (ROUNDS of each) and the median per-point time of each is
reported, with the ratios engine/bare and engine/pymeasure. A cProfile of one engine sweep
lists where its own time goes (the top functions by own time, the exchanges included).
"""

from __future__ import annotations

import cProfile
import io
import os
import pstats
import shutil
import statistics
import tempfile
import threading
import time
from pathlib import Path

from pyvisa import constants

from benchkit.atomic import write_text_atomic
from benchkit.benchmarks.bench_time import top_V, uniform_plan
from benchkit.commands.sim import demo_bench

ENGINE_PART = "BD-1004"  # 25 V: 101 points at 0.5 V steps (the quick run uses 4 V of it)
QUICK_TOP_V = 4.0
# Rounds of each contender: on a shared 2-core machine single rounds of a few hundred ms
# scatter by tens of percent (three rounds gave engine/bare 1.00 to 1.52 over four runs);
# the median of seven moved by about 0.01 between two runs.
ROUNDS = 7
TARGET_BARE_RATIO = 1.2
PROFILE_TOP = 12


class _PointClock:
    """A progress sink that notes the wall time of every saved point (and marks the spy)."""

    def __init__(self, spy=None):
        self.times: list[float] = []
        self.total = 0
        self.spy = spy

    def start(self, total, done=0):
        self.total = total

    def point(self, done, text):
        self.times.append(time.perf_counter())
        if self.spy is not None:
            self.spy.mark()

    def note(self, text):
        pass

    def finish(self, status):
        pass


class ExchangeSpy:
    """Records every raw write and read of the driver sessions: (resource, "w"|"r", text)."""

    def __init__(self, clock=None):
        self.log: list[tuple] = []
        self.marks: list[int] = []
        self._saved = None
        self.clock = clock

    def mark(self) -> None:
        self.marks.append(len(self.log))

    def __enter__(self):
        from instruments.drivers import session as S

        w, r = S.Session._raw_write, S.Session._raw_read
        log = self.log

        def raw_write(sess, command):
            log.append((sess.resource, "w", command))
            return w(sess, command)

        def raw_read(sess):
            reply = r(sess)
            log.append((sess.resource, "r", reply))
            return reply

        self._saved = (w, r)
        S.Session._raw_write, S.Session._raw_read = raw_write, raw_read
        if self.clock is not None:  # the engine's own sleeps, not the simulated meter's
            sleep, me = self.clock.sleep, threading.current_thread()

            def recording_sleep(seconds):
                if threading.current_thread() is me:
                    log.append((None, "s", seconds))
                return sleep(seconds)

            self.clock.sleep = recording_sleep
        return self

    def __exit__(self, *exc):
        from instruments.drivers import session as S

        S.Session._raw_write, S.Session._raw_read = self._saved
        if self.clock is not None:
            del self.clock.sleep

    def parts(self) -> tuple[list, list[list], list]:
        """(before the first saved point, the points between the first and the last saved
        one, after the last): a replay makes all, so that the instruments are in the same
        state as for the engine, and times the middle one."""
        m = self.marks
        return (self.log[:m[0]], [self.log[a:b] for a, b in zip(m[:-1], m[1:])],
                self.log[m[-1]:])


def _terminations():
    from instruments.drivers import load_profile

    return {role: load_profile(name) for role, name in
            (("meter", "generic-lcr"), ("supply", "generic-dc-supply"),
             ("scanner", "generic-scanner"), ("thermometer", "generic-thermometer"),
             ("chamber", "generic-chamber"))}


def _row_text(i: int) -> bytes:
    return (f"{i},FX-04,BD-1004,4,{i},rising,1,0.5,0.5,1e-9,CPD,1000,0.5,0.49,1.0e-6,1e-10,"
            f"0.01,0.1,3,25.0,{i},5.0,5.0,,,2026-01-01T00:00:00.000Z\n").encode()


def _bare(opened, clock, exchanges) -> None:
    """Each exchange through the pyvisa layer the engine's sessions use: the VISA library's
    write and read (viWrite, viRead until the termination character) on the resource's
    session, so that the replay costs the exchanges and nothing else."""
    more = constants.StatusCode.success_max_count_read
    for res, op, text in exchanges:
        if op == "w":
            lib, vi, term = opened[res]
            lib.write(vi, (text + term).encode("ascii"))
        elif op == "r":
            lib, vi, _ = opened[res]
            status = more
            while status == more:
                _, status = lib.read(vi, 20 * 1024)
        else:
            clock.sleep(text)


def replay_bare(resources: dict, recorded, out: Path, clock) -> float:
    """The recorded exchanges through plain pyvisa resources, one fsync'd row per point;
    wall seconds per point."""
    before, segments, after = recorded
    import pyvisa

    rm = pyvisa.ResourceManager("@py")
    profs = _terminations()
    opened, handles = {}, []
    try:
        for role, res in resources.items():
            p = profs.get(role)
            if p is None:
                continue
            r = rm.open_resource(res, read_termination=p.read_termination,
                                 write_termination=p.write_termination, timeout=5000)
            handles.append(r)
            opened[res] = (r.visalib, r.session, p.write_termination)
        # a scratch file of its own (deleted on close): only the write and the fsync count
        fh = tempfile.TemporaryFile(dir=out.parent, buffering=0)
        fd = fh.fileno()
        try:
            _bare(opened, clock, before)
            t0 = time.perf_counter()
            for i, seg in enumerate(segments):
                _bare(opened, clock, seg)
                os.write(fd, _row_text(i))
                os.fsync(fd)
            dt = time.perf_counter() - t0
            _bare(opened, clock, after)
        finally:
            fh.close()
    finally:
        for r in handles:
            r.close()
    return dt / len(segments)


def replay_pymeasure(resources: dict, recorded, out_dir: Path, clock) -> float | str:
    """The same exchanges as a PyMeasure procedure (Worker + Recorder, fsync per row);
    wall seconds per point, or the reason it could not run. PyMeasure's Recorder writes in
    a thread of its own, so its fsyncs overlap the next point's exchanges: timed from the
    first point to the last point's exchanges, it is favoured, not handicapped."""
    before, segments, after = recorded
    try:
        import logging

        import pymeasure.experiment.workers as workers
        from pymeasure.experiment import Procedure, Results, Worker
        from pymeasure.experiment.listeners import Recorder
        from pymeasure.instruments import Instrument
    except ImportError as exc:
        return f"PyMeasure is not installed ({exc}); `make bench` installs the bench extra"

    profs = _terminations()

    class FsyncRecorder(Recorder):
        """PyMeasure's Recorder, with each row flushed and fsync'd (equal durability)."""

        def __init__(self, results, queue, **kwargs):
            super().__init__(results, queue, **kwargs)
            for h in self.handlers:
                emit = h.emit

                def durable(record, h=h, emit=emit):
                    emit(record)
                    h.flush()
                    os.fsync(h.stream.fileno())

                h.emit = durable

    class Replay(Procedure):
        DATA_COLUMNS = ["point", "C_F"]

        def startup(self):
            self.inst = {}
            for role, res in resources.items():
                p = profs.get(role)
                if p is None:
                    continue
                self.inst[res] = Instrument(res, role, visa_library="@py", includeSCPI=False,
                                            read_termination=p.read_termination,
                                            write_termination=p.write_termination)

        def exchange(self, seg):
            last = None
            for j, (res, op, text) in enumerate(seg):
                if op == "s":
                    clock.sleep(text)
                elif op == "w":
                    nxt = seg[j + 1] if j + 1 < len(seg) else None
                    if nxt is not None and nxt[1] == "r" and nxt[0] == res:
                        last = self.inst[res].ask(text)
                        continue
                    self.inst[res].write(text)
                elif j == 0 or seg[j - 1][1] != "w" or seg[j - 1][0] != res:
                    last = self.inst[res].read()
            return last

        def execute(self):
            self.exchange(before)
            t0 = time.perf_counter()
            for i, seg in enumerate(segments):
                self.emit("results", {"point": i, "C_F": self.exchange(seg)})
            timing.append(time.perf_counter() - t0)
            self.exchange(after)

        def shutdown(self):
            for inst in getattr(self, "inst", {}).values():
                inst.adapter.close()

    timing: list[float] = []
    old = workers.Recorder
    workers.Recorder = FsyncRecorder
    logging.getLogger("pymeasure").setLevel(logging.WARNING)
    try:
        proc = Replay()
        results = Results(proc, str(out_dir / "pymeasure.csv"))
        worker = Worker(results)
        worker.start()
        worker.join(timeout=600)
    finally:
        workers.Recorder = old
    rows = sum(1 for line in (out_dir / "pymeasure.csv").read_text().splitlines()
               if line and not line.startswith("#")) - 1
    if rows != len(segments):
        return f"the PyMeasure procedure wrote {rows} rows, not {len(segments)}"
    return timing[0] / len(segments)


def engine_sweep(bench, plan, run_dir: Path, spy: ExchangeSpy | None = None,
                 profile: cProfile.Profile | None = None) -> list[float]:
    from benchkit.sweep import run_sweep

    if run_dir.exists():
        shutil.rmtree(run_dir)
    sink = _PointClock(spy)
    if profile is not None:
        profile.enable()
    try:
        result = run_sweep(bench, plan, run_dir, progress=sink, handle_signals=False)
    finally:
        if profile is not None:
            profile.disable()
    if result.status != "complete" or len(sink.times) < 2:
        raise RuntimeError(f"overhead sweep {result.status}: {result.reason}")
    return sink.times


def run(out_dir: Path, quick: bool = False, log=print) -> dict:
    from benchkit.catalogue import DEMO_FIXTURE, DEMO_PARTS, load_fixture, load_parts

    from benchkit.sweep.plan import parse_plan
    from instruments.clock import VirtualClock

    cat = load_parts(DEMO_PARTS)
    slot = next(s for s in load_fixture(DEMO_FIXTURE, cat) if s.part_id == ENGINE_PART)
    sref = {"sample_id": slot.sample_id, "part_id": slot.part_id, "channel": slot.channel}
    top = QUICK_TOP_V if quick else top_V(cat[ENGINE_PART].rated_V)
    plan_dict = uniform_plan(sref, top)
    plan_dict["name"] = "bench-overhead"
    plan = parse_plan(plan_dict, "bench-overhead")
    base = Path(out_dir) / "runs" / "overhead"
    base.mkdir(parents=True, exist_ok=True)
    engine_s, bare_s, pm_s, pm_note = [], [], [], None
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        with ExchangeSpy(clock) as spy:
            times = engine_sweep(bench, plan, base / "recorded", spy)
        recorded = spy.parts()
        segments = recorded[1]
        n_ex = sum(1 for s in segments for e in s if e[1] != "s") / len(segments)
        for k in range(1 if quick else ROUNDS):
            times = engine_sweep(bench, plan, base / f"engine-{k}")
            engine_s.append((times[-1] - times[0]) / (len(times) - 1))
            with tempfile.TemporaryDirectory(dir=base) as tmp:
                bare_s.append(replay_bare(bench.resources, recorded, Path(tmp) / "rows.csv",
                                           clock))
                got = replay_pymeasure(bench.resources, recorded, Path(tmp), clock)
            if isinstance(got, str):
                pm_note = got
            else:
                pm_s.append(got)
        prof = cProfile.Profile()
        engine_sweep(bench, plan, base / "profiled", profile=prof)
    buf = io.StringIO()
    pstats.Stats(prof, stream=buf).sort_stats("tottime").print_stats(PROFILE_TOP)
    write_text_atomic(base / "engine-profile.txt", buf.getvalue())
    eng, bare = statistics.median(engine_s), statistics.median(bare_s)
    pm = statistics.median(pm_s) if pm_s else None
    res = {
        "what": "wall time per point of the engine's uniform sweep (virtual clock) against the "
                "same SCPI exchanges replayed bare through pyvisa with one fsync'd row per "
                "point, and against a PyMeasure procedure making them with an fsync per row",
        "exchanges_per_point": n_ex,
        "points": len(segments),
        "rounds": len(engine_s),
        "engine_point_wall_s": eng,
        "bare_point_wall_s": bare,
        "pymeasure_point_wall_s": pm,
        "engine_over_bare": eng / bare,
        "engine_over_pymeasure": eng / pm if pm else None,
        "target_engine_over_bare": TARGET_BARE_RATIO,
        "meets_bare_target": eng / bare <= TARGET_BARE_RATIO,
        "meets_pymeasure_target": (eng < pm) if pm else None,
        "profile": str(base / "engine-profile.txt"),
    }
    if pm_note:
        res["pymeasure_skipped"] = pm_note
        log(f"overhead: PyMeasure part skipped: {pm_note}")
    log(f"overhead: engine {eng * 1e3:.2f} ms per point ({n_ex:.0f} exchanges), bare replay "
        f"{bare * 1e3:.2f} ms, ratio {eng / bare:.2f}"
        + (f"; PyMeasure {pm * 1e3:.2f} ms, ratio {eng / pm:.2f}" if pm else ""))
    return res
