"""Helpers for the sweep tests: small plans, run directories, benchkit subprocesses."""

from __future__ import annotations

import csv
import io
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

from benchkit.sweep.progress import Progress

REPO = Path(__file__).resolve().parents[2]


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    raise TypeError(v)


def plan_text(samples=None, bias=None, measure=None, limits=None, name="test-plan") -> str:
    """A small plan: 2 V steps to 4 V and back, 1 s dwell, 2 readings (override any section)."""
    b = {"start_V": 0.0, "stop_V": 4.0, "step_V": 2.0, "branches": ["rising", "falling"]}
    m = {"dwell_s": 1.0, "n_readings": 2}
    lim = {"current_limit_A": 0.01, "max_ramp_V_per_s": 5.0, "discharge_wait_s": 0.5}
    b.update(bias or {})
    m.update(measure or {})
    lim.update(limits or {})
    out = [f"name = {toml_value(name)}", ""]
    for s in samples or []:
        out += ["[[samples]]"] + [f"{k} = {toml_value(v)}" for k, v in s.items()] + [""]
    for title, table in (("bias", b), ("measure", m), ("limits", lim)):
        out += [f"[{title}]"] + [f"{k} = {toml_value(v)}" for k, v in table.items() if v is not None] + [""]
    return "\n".join(out)


def write_plan(path: Path, **kw) -> Path:
    path.write_text(plan_text(**kw), encoding="utf-8")
    return path


def read_rows(run_dir: Path) -> list[dict]:
    with open(run_dir / "points.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def read_meta(run_dir: Path) -> dict:
    return json.loads((run_dir / "run.json").read_text(encoding="utf-8"))


def benchkit_cmd(*args: str) -> list[str]:
    return [sys.executable, "-m", "benchkit", *args]


def start_benchkit(*args: str, **kw) -> subprocess.Popen:
    return subprocess.Popen(benchkit_cmd(*args), cwd=REPO, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, **kw)


def stop_benchkit(proc: subprocess.Popen, timeout_s: float = 10.0) -> int:
    """SIGTERM, as an operator's kill would send; kill it if it does not end; its exit code."""
    proc.send_signal(signal.SIGTERM)
    try:
        proc.communicate(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.communicate()
    return proc.returncode


def wait_for(predicate, timeout_s: float, what: str, proc: subprocess.Popen | None = None):
    """Poll until predicate() is truthy (real time is fine here: nothing is asserted about it)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        v = predicate()
        if v:
            return v
        if proc is not None and proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"process ended (rc {proc.returncode}) before {what}:\n{err}")
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def n_rows(run_dir: Path) -> int:
    try:
        data = (run_dir / "points.csv").read_bytes()
    except FileNotFoundError:
        return 0
    return max(0, data.count(b"\n") - 1)


def supply_state_via_visa(bench_file: Path) -> dict:
    """Ask the supply itself (plain pyvisa, not the driver): output state, set and terminal V."""
    import tomllib

    import pyvisa

    res = tomllib.loads(bench_file.read_text())["instrument"]["supply"]["resource"]
    rm = pyvisa.ResourceManager("@py")
    try:
        inst = rm.open_resource(res, read_termination="\n", write_termination="\n", timeout=5000)
        try:
            return {
                "output_on": inst.query("OUTP?").strip() == "1",
                "set_V": float(inst.query("VOLT?")),
                "terminal_V": float(inst.query("MEAS:VOLT?")),
            }
        finally:
            inst.close()
    finally:
        rm.close()


class CtrlCAfter(Progress):
    """Progress that presses Ctrl-C (SIGINT to this process) after the n-th saved point."""

    def __init__(self, n):
        super().__init__(stream=io.StringIO(), tty=False)
        self.n = n

    def point(self, done, text):
        super().point(done, text)
        if done == self.n:
            os.kill(os.getpid(), signal.SIGINT)


# IEC 60384-1 clause 4.2.2 (science.md 2): class 2 <= 10 uF at 1.0 +-0.2 Vrms, > 10 uF at
# 0.5 +-0.1 Vrms; the demo parts are class 2.
def standard_level_Vrms(nominal_C_F: float) -> float:
    return 1.0 if nominal_C_F <= 10e-6 * (1 + 1e-9) else 0.5


def flags_besides_level(row, nominal_C_F: float) -> str:
    """The row's flags without level_off_standard, after checking that flag is raised exactly
    when the recorded level across the part is outside the standard level's tolerance."""
    flags = [f for f in row["flags"].split(";") if f]
    std = standard_level_Vrms(nominal_C_F)
    dut = row["ac_level_dut_Vrms"]
    outside = dut != "" and abs(float(dut) - std) > 0.2 * std
    assert ("level_off_standard" in flags) == outside, (row["flags"], dut, std)
    return ";".join(f for f in flags if f != "level_off_standard")
