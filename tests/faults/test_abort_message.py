"""What `benchkit measure` tells the operator when a sweep aborts: that the bias supply is at
0 V with its output off, and only when the supply's own read-back confirmed it.

Real aborts of `benchkit measure` subprocesses on the simulated bench: Ctrl-C (SIGINT)
mid-sweep, an instrument error injected mid-sweep, and a bench that dies mid-sweep, so the
supply cannot be reached to confirm anything. The truth each message is held to is the
simulated supply's own state (run.json `sim_final_supply_state`, written from the simulator,
not from the driver), or for the dead bench the fact that nothing could answer.
Source: "the bias supply is always left at 0 V, output off", and a safety statement is made
only when it was checked [common practice].
"""

from __future__ import annotations

import signal

import pytest

from benchkit.cli import main

from fault_kit import keep_benches, read_meta, read_rows, write_plan
from sweep_helpers import n_rows, start_benchkit, wait_for  # beside fault_kit on sys.path

pytestmark = pytest.mark.slow

SAFE_LINE = "benchkit: the bias supply is at 0 V with its output off"
OFF = {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}


def _finish(proc, timeout_s=90):
    try:
        _, err = proc.communicate(timeout=timeout_s)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    return proc.returncode, err


def _aborted_with_safe_supply(out, rc, err):
    meta = read_meta(out)
    assert rc == 1, err
    assert meta["status"] == "aborted" and 0 < len(read_rows(out))
    # the simulated supply as it really was after the shutdown: the message is true
    assert meta["sim_final_supply_state"] == OFF
    final = [e for e in meta["events"] if e["event"] == "supply_final_state"][-1]
    assert final["output_on"] is False and final["voltage_set_V"] == 0.0
    assert SAFE_LINE in err.splitlines()
    assert "WARNING" not in err and "may still be live" not in err


def test_ctrl_c_says_the_supply_is_off(tmp_path):
    plan = write_plan(tmp_path / "plan.toml")
    out = tmp_path / "run"
    # virtual clock at 10x real time: the sweep takes real seconds, so the signal lands mid-sweep
    proc = start_benchkit("measure", "--sim", "--virtual-clock", "--clock-speed", "10",
                          "--plan", str(plan), "--out", str(out))
    try:
        wait_for(lambda: n_rows(out) >= 2, 60, "two saved points", proc)
        proc.send_signal(signal.SIGINT)
    finally:
        rc, err = _finish(proc)
    _aborted_with_safe_supply(out, rc, err)
    assert read_meta(out)["reason"].startswith("SIGINT")


def test_an_instrument_error_mid_sweep_says_the_supply_is_off(tmp_path, monkeypatch):
    plan = write_plan(tmp_path / "plan.toml")
    with keep_benches(monkeypatch) as made:  # a clean run first: how many messages the meter gets
        assert main(["measure", "--sim", "--virtual-clock", "--plan", str(plan),
                     "--out", str(tmp_path / "clean")]) == 0
    half = made[0].faults.count("meter") // 2
    out = tmp_path / "run"
    proc = start_benchkit("measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(out),
                          "--fault", f"error:after={half}")
    rc, err = _finish(proc)
    _aborted_with_safe_supply(out, rc, err)
    assert "InstrumentError: meter" in read_meta(out)["reason"]


def test_no_claim_of_a_safe_supply_when_it_cannot_be_confirmed(tmp_path):
    bench = tmp_path / "bench.toml"
    sim = start_benchkit("sim", "--bench-file", str(bench))
    try:
        wait_for(bench.exists, 30, "the bench file of benchkit sim", sim)
        plan = write_plan(tmp_path / "plan.toml", measure={"dwell_s": 0.3},
                          limits={"max_ramp_V_per_s": 20.0, "discharge_wait_s": 0.2})
        out = tmp_path / "run"
        proc = start_benchkit("measure", "--bench", str(bench), "--plan", str(plan), "--out", str(out),
                              "--io-timeout-s", "0.5")
        try:
            wait_for(lambda: n_rows(out) >= 2, 60, "two saved points", proc)
            sim.kill()  # the whole bench goes: nothing can confirm the supply's state
            sim.communicate(timeout=30)
        finally:
            rc, err = _finish(proc)
    finally:
        if sim.poll() is None:
            sim.kill()
            sim.communicate()
    meta = read_meta(out)
    assert rc == 1, err
    assert meta["status"] == "aborted"
    assert "0 V with its output off" not in err
    assert "WARNING" in err and "may still be live" in err and "by hand" in err
    assert any(e["event"] == "supply_not_confirmed_safe" for e in meta["events"])
