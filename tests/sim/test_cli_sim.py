"""`benchkit sim` as an operator runs it: a subprocess, resources on stdout, Ctrl-C to stop.

Sources: POSIX signal conventions (SIGINT from Ctrl-C, SIGTERM from a service manager; a
clean stop exits 0: common practice), TOML 1.0 read by Python's tomllib (the reference
parser of the standard library), the project's exit codes (benchkit/errors.py: 2 = bad input).
"""

from __future__ import annotations

import os
import queue
import signal
import subprocess
import sys
import threading
import tomllib
from pathlib import Path

import pytest
import pyvisa

REPO = Path(__file__).resolve().parents[2]


def start_sim(*args):
    env = dict(os.environ, PYTHONPATH=str(REPO), PYTHONUNBUFFERED="1")
    return subprocess.Popen([sys.executable, "-m", "benchkit", "sim", *args], cwd=REPO, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def read_lines(proc, n, timeout_s=30):
    """The first n stdout lines, without hanging the test if the process misbehaves."""
    lines: queue.Queue = queue.Queue()

    def pump():
        for line in proc.stdout:
            lines.put(line.rstrip("\n"))
        lines.put(None)

    threading.Thread(target=pump, daemon=True).start()
    out = []
    while len(out) < n:
        try:
            line = lines.get(timeout=timeout_s)
        except queue.Empty:
            break
        if line is None:
            break
        out.append(line)
    return out


def stop(proc, signum):
    proc.send_signal(signum)
    try:
        return proc.wait(timeout=30)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
        raise


@pytest.mark.slow
def test_sim_prints_resources_writes_bench_file_and_stops_on_sigint(tmp_path):
    bench_file = tmp_path / "out" / "bench.toml"
    proc = start_sim("--bench-file", str(bench_file), "--virtual-clock")
    try:
        lines = read_lines(proc, 6)
        assert [line.split()[0] for line in lines] == ["meter", "supply", "scanner",
                                                       "thermometer", "chamber", "bench"]
        resources = dict(line.split() for line in lines[:5])
        for resource in resources.values():
            assert resource.startswith("TCPIP0::127.0.0.1::") and resource.endswith("::SOCKET")
        # the bench file parses as TOML and points at the same resources (contract section 4)
        doc = tomllib.loads(bench_file.read_text(encoding="utf-8"))
        assert {r: e["resource"] for r, e in doc["instrument"].items()} == resources
        assert len(doc["channel"]) == 8
        # and the instruments answer through pyvisa
        rm = pyvisa.ResourceManager("@py")
        try:
            m = rm.open_resource(resources["meter"], read_termination="\n",
                                 write_termination="\n", timeout=3000)
            assert m.query("*IDN?").startswith("benchkit-sim,SIM-LCR,")
            m.close()
        finally:
            rm.close()
    finally:
        code = stop(proc, signal.SIGINT)
    # POSIX: Ctrl-C stops the foreground process; a clean stop is exit 0 (common practice)
    assert code == 0
    assert "stopped" in proc.stderr.read()


@pytest.mark.slow
def test_sim_lot_with_fault_stops_on_sigterm():
    proc = start_sim("--lot", "--fault", "drop:after=100", "--seed", "3")
    try:
        lines = read_lines(proc, 4)
        assert len(lines) == 4
    finally:
        code = stop(proc, signal.SIGTERM)
    assert code == 0


def test_bad_parts_file_is_one_line_and_exit_2(tmp_path):
    # benchkit/errors.py: bad input -> one line on stderr, exit code 2, nothing started
    bad = tmp_path / "parts.toml"
    bad.write_text("company = \n", encoding="utf-8")
    proc = start_sim("--parts", str(bad))
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("benchkit: error: ")
    assert str(bad) in lines[0] and "TOML syntax error" in lines[0]


@pytest.mark.parametrize("args,words", [
    (["--parts", "{missing}"], "file not found"),
    (["--fault", "explode"], "kind 'explode' is unknown"),
    (["--fault", "drop:after=x"], "must be an integer"),
    (["--port", "70000"], "--port 70000"),
    (["--lot", "--fixture", "{fixture}"], "unknown field 'fixture_id'"),  # not a lot file
])
def test_bad_input_in_process_is_one_line_and_exit_2(tmp_path, capsys, args, words):
    # benchkit/errors.py: exit code 2 and one line; the same entry point as the subprocess
    from benchkit.cli import main
    from benchkit.catalogue import DEMO_FIXTURE

    args = [a.format(missing=tmp_path / "nope.toml", fixture=DEMO_FIXTURE) for a in args]
    assert main(["sim", *args]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and words in lines[0]


def test_help_carries_the_safety_note():
    from benchkit.cli import SAFETY_NOTE, build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    assert sub.choices["sim"].epilog == SAFETY_NOTE
