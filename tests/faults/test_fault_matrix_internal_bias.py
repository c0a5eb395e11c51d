"""The supply's fault matrix (test_fault_matrix.py) applied to the meter's internal bias.

`benchkit measure --sim --sim-dialect alt --virtual-clock`: the simulated meter speaks its
second dialect through its profile alone, holds the standard level across the part and biases
the part itself; the bench file names no supply. Every fault kind strikes mid-sweep, on the
meter (which now carries the bias) or the thermometer, and the same answers must follow:
the bias really ends at 0 V and off (the fixture's own state), points.csv holds every
completed point once, run.json says what happened.

Sources: as test_fault_matrix.py (pyvisa pitfalls; "the bias always ends at 0 V with its
output off" [common practice]; SCPI-1999, from memory, for 9.9E37 and SYSTem:ERRor?);
IEC 60384-1 (science.md 2) for 1.0 +-0.2 Vrms across a 10 uF class-2 part.
"""

from __future__ import annotations

import pytest

from benchkit.cli import main

from fault_kit import (PARTS, flags_besides_level, flags_of, keep_benches, planned_keys,
                       read_meta, read_rows, row_keys, write_plan)

IO_TIMEOUT_S = "0.3"
OPTIONS = {"late": ":delay=0.6", "temp-drift": ":rate=30"}
EXPECTED = {  # the supply's matrix: kind -> (exit code, flag the recovered points carry)
    "timeout": (0, "retried"),
    "drop": (0, "retried"),
    "garble": (0, "retried"),
    "late": (0, "retried"),
    "overload": (0, "overload"),
    "current-limit": (0, "current_limit"),
    "temp-drift": (0, "temp_change"),
    "error": (1, None),
}
LINK_KINDS = ("timeout", "drop", "garble", "late")
ROLE = {"temp-drift": "thermometer"}   # every other fault on the meter: it carries the bias


def measure(plan, out, *faults):
    argv = ["measure", "--sim", "--sim-dialect", "alt", "--virtual-clock", "--plan", str(plan),
            "--out", str(out), "--io-timeout-s", IO_TIMEOUT_S]
    for f in faults:
        argv += ["--fault", f]
    return main(argv)


@pytest.fixture(scope="module")
def clean_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("clean-alt")
    plan = write_plan(tmp / "plan.toml")
    mp = pytest.MonkeyPatch()
    try:
        with keep_benches(mp) as made:
            code = measure(plan, tmp / "run")
    finally:
        mp.undo()
    assert code == 0
    bench = made[0]
    assert bench.dialect == "alt"
    counts = {role: bench.faults.count(role) for role in ("meter", "supply", "thermometer")}
    assert counts["supply"] == 0                     # the external supply was never spoken to
    rows = read_rows(tmp / "run")
    meta = read_meta(tmp / "run")
    assert row_keys(rows) == planned_keys(plan)
    assert all(flags_besides_level(r, PARTS[r["part_id"]].nominal_C_F) == "" for r in rows)
    # level control held the standard level across the 10 uF parts: no point is off it
    assert all(abs(float(r["ac_level_dut_Vrms"]) - 1.0) <= 0.2 for r in rows)
    assert meta["bias_source"] == "meter"
    assert meta["meter_capabilities"]["internal_bias"].startswith("used")
    assert meta["meter_capabilities"]["level_control"].startswith("used")
    # the internal bias reached each step: its own monitor read it back within tolerance
    assert all(abs(float(r["bias_meas_V"]) - float(r["bias_set_V"])) <= 0.05 for r in rows)
    assert max(float(r["bias_set_V"]) for r in rows) == 4.0
    return plan, counts


@pytest.mark.parametrize("kind", sorted(EXPECTED))
def test_fault_in_mid_sweep_on_the_internal_bias(kind, clean_run, tmp_path, monkeypatch, capsys):
    plan, counts = clean_run
    role = ROLE.get(kind, "meter")
    spec = f"{kind}:after={counts[role] // 2}:role={role}{OPTIONS.get(kind, '')}"
    out = tmp_path / "run"
    with keep_benches(monkeypatch) as made:
        code = measure(plan, out, spec)
    err = capsys.readouterr().err
    want_code, want_flag = EXPECTED[kind]
    bench = made[0]
    assert code == want_code, err
    assert [f.kind for f in bench.faults.fired] == [kind]
    state = bench.supply_state()       # the fixture's bias node: driven by the meter here
    assert state["output_on"] is False and state["set_V"] == 0.0 and abs(state["terminal_V"]) < 1e-6
    planned = planned_keys(plan)
    rows = read_rows(out)
    meta = read_meta(out)
    got = row_keys(rows)
    assert got == planned[: len(got)]
    if want_code == 0:
        assert got == planned and meta["status"] == "complete"
        flagged = [i for i, r in enumerate(rows) if want_flag in flags_of(r)]
        recovered = [e for e in meta["events"] if e["event"] == "link_recovered"]
        if kind in LINK_KINDS:
            # recorded as an event; the point carries `retried` when the exchange was one of
            # its own (a retry while configuring the next sample is an event only)
            # (no claim on which point: with a 0.3 s real-time I/O timeout a loaded machine may
            # add a genuine retry of its own anywhere)
            assert recovered and "meter" in {e["role"] for e in recovered}, meta["events"]
        else:
            assert flagged and 0 < flagged[0] < len(rows), [r["flags"] for r in rows]
    else:
        assert meta["status"] == "aborted" and 0 < len(rows) < len(planned)
        assert meta["reason"].startswith("InstrumentError: meter (TCPIP0::127.0.0.1::")
        assert [e["event"] for e in meta["events"]][-1] == "abort"
    if kind == "drop":
        assert any(e.get("reconnects") for e in meta["events"] if e["event"] == "link_recovered")
