"""Ctrl-C, SIGTERM and kill -9 of a `benchkit measure` process mid-sweep, then --resume.

The bias supply must end at 0 V with its output off (common practice: a fixture is never
left live), and the run directory must hold every completed point exactly once. Real-time waits here only poll for progress; nothing asserts
how long anything took.
"""

import hashlib
import signal

import pytest

from sweep_helpers import n_rows, read_meta, read_rows, start_benchkit, supply_state_via_visa, wait_for, write_plan

SAMPLES = [{"sample_id": "FX-01", "part_id": "BD-1001", "channel": 1},
           {"sample_id": "FX-03", "part_id": "BD-1003", "channel": 3}]
PLANNED = [(s["sample_id"], i) for s in SAMPLES for i in range(5)]  # 0, 2, 4, 2, 0 V each

pytestmark = pytest.mark.slow


def _sim_measure(tmp_path, *extra):
    plan = write_plan(tmp_path / "plan.toml", samples=SAMPLES)
    out = tmp_path / "run"
    # virtual clock at 10x: each clock second also waits 0.1 s, so the sweep takes real seconds
    proc = start_benchkit("measure", "--sim", "--virtual-clock", "--clock-speed", "10",
                          "--plan", str(plan), "--out", str(out), *extra)
    return proc, out


def _check_prefix_on_disk(out, rows):
    data = (out / "points.csv").read_bytes()
    assert data.endswith(b"\n")  # no half-written row
    got = [(r["sample_id"], int(r["step_index"])) for r in rows]
    assert got == PLANNED[: len(got)]  # the completed points, in plan order, each once


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_signal_mid_sweep_of_measure_sim(tmp_path, sig):
    proc, out = _sim_measure(tmp_path)
    try:
        wait_for(lambda: n_rows(out) >= 2, 60, "two saved points", proc)
        proc.send_signal(sig)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 1, err
    meta = read_meta(out)
    rows = read_rows(out)
    assert meta["status"] == "aborted" and meta["reason"].startswith(sig.name)
    assert 2 <= len(rows) < len(PLANNED)
    _check_prefix_on_disk(out, rows)
    abort = [e for e in meta["events"] if e["event"] == "abort"][0]
    assert abort["points_new"] == len(rows)  # every completed point is in the file
    # the embedded bench's supply as it really was after the shutdown (its own oracle)
    assert meta["sim_final_supply_state"] == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
    assert "aborted" in err and "--resume" in err


def test_ctrl_c_on_a_separate_sim_process_leaves_supply_off(tmp_path, sim_process):
    plan = write_plan(tmp_path / "plan.toml", samples=SAMPLES, measure={"dwell_s": 0.3},
                      limits={"max_ramp_V_per_s": 20.0, "discharge_wait_s": 0.2})
    out = tmp_path / "run"
    proc = start_benchkit("measure", "--bench", str(sim_process), "--plan", str(plan), "--out", str(out))
    try:
        wait_for(lambda: n_rows(out) >= 2, 60, "two saved points", proc)
        on = supply_state_via_visa(sim_process)
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert on["output_on"]  # the check below can fail: mid-sweep the output really was on
    assert proc.returncode == 1, err
    assert "CAUTION" in err and err.count("CAUTION") == 1  # printed once for a real bench
    st = supply_state_via_visa(sim_process)  # asked over the wire, after measure has exited
    assert st == {"output_on": False, "set_V": 0.0, "terminal_V": 0.0}
    meta = read_meta(out)
    assert meta["status"] == "aborted" and meta["reason"].startswith("SIGINT")
    _check_prefix_on_disk(out, read_rows(out))


def test_kill_9_then_resume_writes_each_point_once(tmp_path):
    proc, out = _sim_measure(tmp_path)
    try:
        wait_for(lambda: n_rows(out) >= 3, 60, "three saved points", proc)
        proc.kill()  # SIGKILL: no handler, no cleanup, possibly a partial last line
        proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert read_meta(out)["status"] == "running"  # nobody could record the end
    done_before = n_rows(out)
    proc = start_benchkit("measure", "--resume", str(out))
    out_text, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err
    rows = read_rows(out)
    assert [(r["sample_id"], int(r["step_index"])) for r in rows] == PLANNED  # once each, no gaps
    assert len({r["run_id"] for r in rows}) == 1
    meta = read_meta(out)
    assert meta["status"] == "complete"
    assert meta["points_sha256"] == hashlib.sha256((out / "points.csv").read_bytes()).hexdigest()
    assert meta["sim_final_supply_state"]["output_on"] is False
    resume = [e for e in meta["events"] if e["event"] == "resume"]
    assert len(resume) == 1 and resume[0]["points_done"] == done_before  # complete lines kept
