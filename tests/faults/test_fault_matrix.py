"""Every fault kind of the simulated bench, in the middle of a two-sample sweep.

Each case runs `benchkit measure --sim --virtual-clock --fault KIND:after=N` in-process
(pyvisa-py over loopback TCP to the simulated bench), N being half the messages the fault's
instrument receives in a clean run of the same plan, so the fault strikes mid-sweep. Then it
checks what the operator and the data rely on:
- the supply really is at 0 V with its output off (the simulated supply's own state);
- points.csv holds every completed point, in plan order, none twice;
- run.json says what happened (status, reason, events, flags);
- the exit code says it: 0 = complete (with flags where the run recovered), 1 = aborted.

What the engine answers to each kind (the matrix):
| kind          | answer                                                            | exit |
|---------------|-------------------------------------------------------------------|------|
| timeout       | resync (*CLS, *OPC?) and retry; point flagged `retried`           | 0    |
| drop          | reconnect, re-apply settings, retry; point flagged `retried`      | 0    |
| garble        | resync and retry; point flagged `retried`                         | 0    |
| late          | the stale reply is discarded by the resync; flagged `retried`     | 0    |
| overload      | the 9.9E37 reading left out; point flagged `overload`             | 0    |
| current-limit | points flagged `current_limit` (and `bias_readback`)              | 0    |
| temp-drift    | points flagged `temp_change` beyond limits.temp_tolerance_C       | 0    |
| error         | the instrument reported an error: abort safely, message names it  | 1    |

Sources: recovery after timeouts and dropped links per the pyvisa pitfalls (resynchronise
after a timeout; a closed link looks like a timeout; reopen a bounded number of times) and
"the bias supply is always left at 0 V, output off" [common practice]; SCPI-1999 (from
memory) for 9.9E37 as the overrange value and SYSTem:ERRor? as the error queue.
"""

from __future__ import annotations

import pytest

from benchkit.cli import main
from instruments.sim.faults import DEFAULT_ROLE, KINDS

from fault_kit import (PARTS, flags_besides_level, flags_of, keep_benches, planned_keys,
                       read_meta, read_rows, row_keys, write_plan)

CLEAN_IO_TIMEOUT_S = "5"
IO_TIMEOUT_S = "0.3"  # real seconds a swallowed reply costs; the late reply comes after 0.6 s
OPTIONS = {"late": ":delay=0.6", "temp-drift": ":rate=30"}  # 30 degC/min: beyond 2 degC in a sample
EXPECTED = {  # kind -> (exit code, flag the recovered points carry)
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


CHAMBER_KINDS = ("refuse", "unstable")  # need a temperature plan: tests/faults/test_chamber_faults.py


def test_the_matrix_covers_every_fault_kind():
    assert set(EXPECTED) | set(CHAMBER_KINDS) == set(KINDS)


def measure(tmp_path, plan, out, *faults, io_timeout_s=IO_TIMEOUT_S):
    argv = ["measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(out),
            "--io-timeout-s", io_timeout_s]
    for f in faults:
        argv += ["--fault", f]
    return main(argv)


@pytest.fixture(scope="module")
def clean_run(tmp_path_factory):
    """The plan without faults: how many messages each instrument gets, and the points."""
    tmp = tmp_path_factory.mktemp("clean")
    plan = write_plan(tmp / "plan.toml")
    mp = pytest.MonkeyPatch()
    try:
        with keep_benches(mp) as made:
            # a reply slower than the fault runs' short timeout on a loaded machine would be
            # retried and flagged here; without faults nothing needs to time out quickly
            code = measure(tmp, plan, tmp / "run", io_timeout_s=CLEAN_IO_TIMEOUT_S)
    finally:
        mp.undo()
    assert code == 0
    bench = made[0]
    counts = {role: bench.faults.count(role) for role in ("meter", "supply", "scanner", "thermometer")}
    rows = read_rows(tmp / "run")
    assert row_keys(rows) == planned_keys(plan)
    flags = [flags_besides_level(r, PARTS[r["part_id"]].nominal_C_F) for r in rows]
    assert all(f == "" for f in flags), flags
    return plan, counts


@pytest.mark.parametrize("kind", sorted(EXPECTED))
def test_fault_in_mid_sweep(kind, clean_run, tmp_path, monkeypatch, capsys):
    plan, counts = clean_run
    role = DEFAULT_ROLE[kind]
    spec = f"{kind}:after={counts[role] // 2}{OPTIONS.get(kind, '')}"
    out = tmp_path / "run"
    with keep_benches(monkeypatch) as made:
        code = measure(tmp_path, plan, out, spec)
    err = capsys.readouterr().err
    want_code, want_flag = EXPECTED[kind]
    bench = made[0]

    assert code == want_code, err
    assert [f.kind for f in bench.faults.fired] == [kind]  # it did strike, once
    # the supply as it really is (test oracle of the simulated bench), not what the engine says
    state = bench.supply_state()
    assert state["output_on"] is False and state["set_V"] == 0.0 and abs(state["terminal_V"]) < 1e-6

    planned = planned_keys(plan)
    rows = read_rows(out)
    meta = read_meta(out)
    got = row_keys(rows)
    assert got == planned[: len(got)]  # every saved point is the next planned one: no gap, none twice
    if want_code == 0:
        assert got == planned and meta["status"] == "complete" and meta["reason"] is None
        flagged = [i for i, r in enumerate(rows) if want_flag in flags_of(r)]
        # mid-sweep: clean points before the fault, flagged ones after it
        assert flagged and 0 < flagged[0] < len(rows), [r["flags"] for r in rows]
        assert all(want_flag not in flags_of(r) for r in rows[: flagged[0]])
        assert meta["points_sha256"] and "complete" in [e["event"] for e in meta["events"]]
    else:
        assert meta["status"] == "aborted" and 0 < len(rows) < len(planned)
        assert f"{len(rows)} of {len(planned)} points" in meta["reason"]
        assert "aborted" in err and f"--resume {out}" in err
    if kind in LINK_KINDS:
        recovered = [e for e in meta["events"] if e["event"] == "link_recovered"]
        assert recovered and recovered[0]["role"] == role, meta["events"]
    if kind == "drop":
        assert any(e.get("reconnects") for e in meta["events"] if e["event"] == "link_recovered")
    if kind == "overload":  # one reading of 2 answered 9.9E37: left out, the other kept
        over = [r for r in rows if "overload" in flags_of(r)]
        assert len(over) == 1 and over[0]["n_readings"] == "1" and float(over[0]["C_F"]) > 0
    if kind == "current-limit":  # stays: every later point with bias applied is limited
        first = flagged[0]
        assert all("current_limit" in flags_of(r) for r in rows[first:] if float(r["bias_set_V"]) > 0)
    if kind == "error":
        # one line that names the instrument, its address, what it said and what to check
        reason = meta["reason"]
        assert reason.startswith("InstrumentError: meter (TCPIP0::127.0.0.1::")
        assert '-222,"Data out of range; injected fault"' in reason and "check" in reason
        assert [e["event"] for e in meta["events"]][-1] == "abort"
