"""Soak: peak memory of a long sweep against a short one, each in a fresh process.

A sweep must run in constant memory per point: rows go to disk, planned points are made
when needed (benchkit.sweep.plan.PlannedPoints). The benchmark sweeps the same minimal plan
(one sample, 200 rising points per repeat, one reading per point, 10 ms fixed dwell, on a
virtual clock) for 2,000 and for 200,000 points, each in its own Python process, and reports
the peak resident set size (getrusage ru_maxrss) of both and their ratio.

What is measured is the engine's memory, so the transport is made cheap: the real drivers
(profiles, sessions, error queues, recovery counters) talk to the simulated instruments'
SCPI handlers in-process (_LoopResourceManager) instead of over loopback TCP, and the run
directories go to a memory file system when there is one (/dev/shm), where fsync is nil.
The TCP path and its cost per point are the overhead benchmark's business.

A resume must not hold the rows already on disk either (benchkit.sweep.runlog.StoredRows
streams them): each sweep is stopped by a Ctrl-C RESUME_TAIL points before its end, and the
resume, in a fresh process of its own, checks every stored row against its digest and
measures the rest; its peak RSS is compared the same way.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SHORT_POINTS = 2_000
LONG_POINTS = 200_000
QUICK_SHORT_POINTS = 200  # --quick only checks that it runs; the ratio needs the full sizes
QUICK_LONG_POINTS = 1_000
PER_REPEAT = 200
TARGET_RATIO = 1.10
RESUME_TAIL = 100  # points left for the resume


def soak_plan(n_points: int) -> str:
    if n_points % PER_REPEAT:
        raise ValueError(f"soak: {n_points} is not a multiple of {PER_REPEAT} points")
    points = ", ".join(f"{0.03 * k:.2f}" for k in range(PER_REPEAT))  # 0 .. 5.97 V, BD-1001 is 6.3 V
    return f"""name = "soak"
[[samples]]
sample_id = "SOAK-01"
part_id = "BD-1001"
channel = 1
[bias]
points_V = [{points}]
branches = ["rising"]
repeats = {n_points // PER_REPEAT}
[measure]
dwell_s = 0.01
n_readings = 1
[limits]
current_limit_A = 0.01
max_ramp_V_per_s = 100.0
discharge_wait_s = 0.0
"""


def _peak_rss_bytes() -> int:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux: kilobytes


def _current_rss_bytes() -> int:
    try:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except OSError:
        return _peak_rss_bytes()


class _LoopResource:
    """A pyvisa-like resource that hands each message to a simulated instrument's handler."""

    def __init__(self, instrument):
        import collections

        self.instrument = instrument
        self.replies = collections.deque()
        self.read_termination = self.write_termination = "\n"
        self.timeout = 2000

    def write(self, message: str) -> int:
        reply = self.instrument.handle(message)
        if reply is not None:
            self.replies.append(reply)
        return len(message)

    def read(self) -> str:
        from pyvisa import constants
        from pyvisa.errors import VisaIOError

        if not self.replies:
            raise VisaIOError(constants.StatusCode.error_timeout)
        return self.replies.popleft()

    def close(self) -> None:
        self.replies.clear()


class _LoopResourceManager:
    def __init__(self, by_resource: dict):
        self.by_resource = by_resource

    def open_resource(self, resource: str, **_):
        return _LoopResource(self.by_resource[resource])

    def close(self) -> None:
        pass


def _instruments(stack, clock):
    """The real drivers on the demo bench's simulated instruments, answered in-process."""
    from benchkit.commands.sim import demo_bench
    from benchkit.sweep.benchfile import Instruments
    from instruments.drivers import BiasSupply, LCRMeter, Scanner, Thermometer

    bench = demo_bench(clock=clock)  # not started: no servers, its instruments answer in-process
    classes = {"meter": LCRMeter, "supply": BiasSupply, "scanner": Scanner, "thermometer": Thermometer}
    resources = {role: f"TCPIP0::127.0.0.1::{5025 + i}::SOCKET" for i, role in enumerate(classes)}
    rm = _LoopResourceManager({resources[r]: bench.instruments[r] for r in classes})
    drivers = {r: stack.enter_context(cls(resources[r], rm=rm, role=r)) for r, cls in classes.items()}
    return Instruments(**drivers)


class _CtrlCAt:
    """Progress that presses Ctrl-C (SIGINT to this process) once `n` points are saved."""

    def __init__(self, n: int):
        from benchkit.sweep.progress import Progress

        self.n, self.inner = n, Progress(stream=io.StringIO(), tty=False)

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def point(self, done, text):
        self.inner.point(done, text)
        if done == self.n:
            os.kill(os.getpid(), signal.SIGINT)


def worker(n_points: int, folder: Path) -> dict:
    """One sweep in this process, stopped RESUME_TAIL points before its end; what it cost."""
    import contextlib

    from benchkit.atomic import write_text_atomic
    from benchkit.catalogue import load_catalogue
    from benchkit.sweep import run_sweep
    from benchkit.sweep.plan import load_plan
    from instruments.clock import VirtualClock

    folder.mkdir(parents=True, exist_ok=True)
    write_text_atomic(folder / "plan.toml", soak_plan(n_points))
    parts = load_catalogue()
    plan = load_plan(folder / "plan.toml", parts)
    clock = VirtualClock()
    with contextlib.ExitStack() as stack:
        inst = _instruments(stack, clock)
        before = _current_rss_bytes()
        t = time.perf_counter()
        res = run_sweep(inst, plan, folder / "run", clock, _CtrlCAt(n_points - RESUME_TAIL),
                        parts=parts)
        wall = time.perf_counter() - t
    return {"points": res.n_points, "status": res.status, "wall_s": wall,
            "rss_before_sweep_bytes": before, "peak_rss_bytes": _peak_rss_bytes()}


def resume_worker(folder: Path) -> dict:
    """Resume the stopped sweep of `worker` in this (fresh) process; what it cost."""
    import contextlib

    from benchkit.catalogue import load_catalogue
    from benchkit.sweep import resume_sweep
    from instruments.clock import VirtualClock

    parts = load_catalogue()
    clock = VirtualClock()
    with contextlib.ExitStack() as stack:
        inst = _instruments(stack, clock)
        before = _current_rss_bytes()
        t = time.perf_counter()
        res = resume_sweep(folder / "run", inst, clock, parts=parts, handle_signals=False)
        wall = time.perf_counter() - t
    return {"points": res.n_points, "new_points": res.n_new, "status": res.status, "wall_s": wall,
            "rss_before_resume_bytes": before, "peak_rss_bytes": _peak_rss_bytes()}


def _run_worker(mode: str, n_points: int, folder: Path) -> dict:
    repo = Path(__file__).resolve().parents[2]
    out = subprocess.run([sys.executable, "-m", "benchkit.benchmarks.soak", f"--{mode}",
                          str(n_points), str(folder)], cwd=repo, capture_output=True, text=True)
    if out.returncode != 0:
        raise RuntimeError(f"soak {mode} ({n_points} points) failed: {out.stderr.strip()[-500:]}")
    res = json.loads(out.stdout.strip().splitlines()[-1])
    want = ("aborted", n_points - RESUME_TAIL) if mode == "worker" else ("complete", n_points)
    if (res["status"], res["points"]) != want:
        raise RuntimeError(f"soak {mode} ({n_points} points): {res['status']} with {res['points']} "
                           f"points, expected {want[0]} with {want[1]}")
    return res


def _soak_pair(n_points: int, folder: Path, log) -> tuple[dict, dict]:
    sweep = _run_worker("worker", n_points, folder)
    log(f"soak {n_points} points: sweep peak RSS {sweep['peak_rss_bytes'] / 1e6:.1f} MB "
        f"in {sweep['wall_s']:.1f} s (stopped {RESUME_TAIL} points before the end)")
    resumed = _run_worker("resume", n_points, folder)
    log(f"soak {n_points} points: resume peak RSS {resumed['peak_rss_bytes'] / 1e6:.1f} MB "
        f"in {resumed['wall_s']:.1f} s ({resumed['new_points']} points measured)")
    return sweep, resumed


def run(out_dir, quick: bool = False, log=print) -> dict:
    short_n = QUICK_SHORT_POINTS if quick else SHORT_POINTS
    long_n = QUICK_LONG_POINTS if quick else LONG_POINTS
    shm = Path("/dev/shm")
    base = Path(tempfile.mkdtemp(prefix="benchkit-soak-", dir=shm if shm.is_dir() else None))
    try:
        short, short_resume = _soak_pair(short_n, base / "short", log)
        long, long_resume = _soak_pair(long_n, base / "long", log)
    finally:
        shutil.rmtree(base, ignore_errors=True)
    ratio = long["peak_rss_bytes"] / short["peak_rss_bytes"]
    resume_ratio = long_resume["peak_rss_bytes"] / short_resume["peak_rss_bytes"]
    grow = (long["peak_rss_bytes"] - long["rss_before_sweep_bytes"]) - \
        (short["peak_rss_bytes"] - short["rss_before_sweep_bytes"])
    return {
        "what": "peak RSS of a long sweep over a short one of the same plan, and of their resumes, "
                "fresh processes (virtual clock, 1 reading per point, run directories on "
                + str(base.parent) + ")",
        "short": short, "long": long, "peak_ratio": ratio, "target_ratio": TARGET_RATIO,
        "short_resume": short_resume, "long_resume": long_resume, "resume_peak_ratio": resume_ratio,
        "within_target": ratio <= TARGET_RATIO and resume_ratio <= TARGET_RATIO,
        "extra_bytes_per_point": grow / (long_n - short_n),
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchkit.benchmarks.soak")
    mode = ap.add_mutually_exclusive_group(required=True)
    mode.add_argument("--worker", nargs=2, metavar=("N_POINTS", "FOLDER"))
    mode.add_argument("--resume", nargs=2, metavar=("N_POINTS", "FOLDER"))
    args = ap.parse_args(argv)
    if args.worker:
        print(json.dumps(worker(int(args.worker[0]), Path(args.worker[1]))))
    else:
        print(json.dumps(resume_worker(Path(args.resume[1]))))
    return 0


if __name__ == "__main__":
    sys.exit(main())
