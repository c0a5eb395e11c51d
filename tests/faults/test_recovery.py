"""How the sweep recovers from a dropped link, and how it stops when it cannot.

Through pyvisa-py against the simulated bench on a virtual clock. Sources: the pyvisa
pitfalls (a link closed by the instrument shows up as a timeout; reopen a bounded number of
times; resynchronise before trusting a reply), IEEE 488.2 (*IDN?, *RST: an instrument that
restarted is back at its reset values), and "the bias supply is always left at 0 V, output
off; if it cannot be switched off, say so" [common practice].
"""

from __future__ import annotations

import re

import pytest

from benchkit.sweep.plan import load_plan
from benchkit.sweep import run_sweep
from instruments.clock import VirtualClock
from instruments.sim import Fault, SimBench

from fault_kit import PARTS, Spy, flags_of, planned_keys, read_meta, read_rows, row_keys, write_plan
from benchkit.commands.sim import demo_bench

# not the reset values (1 kHz, 1 V, CPD: COMMANDS.md), so that a meter that restarted and was
# not set up again would show
MEASURE = {"function": "CSD", "freq_Hz": 10000.0, "ac_level_Vrms": 0.5}


def sweep(tmp_path, faults=(), reset_on_drop=False, measure=MEASURE):
    plan_path = write_plan(tmp_path / "plan.toml", measure=measure)
    plan = load_plan(plan_path, PARTS)
    clock = VirtualClock()
    bench = demo_bench(clock=clock, faults=[Fault.parse(f) for f in faults])
    with bench:
        spy = Spy(bench, reset_on_drop)
        result = run_sweep(bench, plan, tmp_path / "run", clock, parts=PARTS,
                           io_timeout_s=0.3, handle_signals=False)
    return result, bench, spy, planned_keys(plan_path)


def test_dropped_meter_link_mid_sweep_no_gap_no_duplicate(tmp_path):
    # message 27 of 69 to the meter (a FETCh?): the first sample's falling leg
    result, bench, spy, planned = sweep(tmp_path, ["drop:after=26"])
    rows = read_rows(tmp_path / "run")
    assert result.status == "complete" and result.exit_code == 0
    assert row_keys(rows) == planned  # every planned point once, in order
    retried = [i for i, r in enumerate(rows) if "retried" in flags_of(r)]
    assert len(retried) == 1 and 0 < retried[0] < len(rows) - 1
    # re-established before going on: identity, then function, frequency and level
    after = spy.after_drop("meter")
    assert after[0] == "*IDN?"
    first_measure = after.index("INITiate")
    setup = after[:first_measure]
    for cmd in ("FUNCtion CSD", "SOURce:FREQuency 10000", "SOURce:VOLTage 0.5"):
        assert cmd in setup, setup
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}


def test_supply_link_drop_reapplies_limit_and_voltage_before_the_next_step(tmp_path):
    result, bench, spy, planned = sweep(tmp_path, ["drop:role=supply:after=60"])
    assert result.status == "complete" and row_keys(read_rows(tmp_path / "run")) == planned
    after = spy.after_drop("supply")
    assert after[0] == "*IDN?"
    # BiasSupply._after_reconnect: the current limit first, then the programmed voltage; never
    # the output (the driver does not switch an output on by itself)
    sets = [t for t in after if not t.endswith("?") and not t.startswith("*")]
    assert sets[0] == "CURRent 0.01" and sets[1].startswith("VOLTage ")
    assert not any(t.startswith("OUTPut ") for t in after[:4])
    events = [e for e in read_meta(tmp_path / "run")["events"] if e["event"] == "link_recovered"]
    assert events and events[0]["role"] == "supply" and events[0]["reconnects"] == 1


def check_truth_at_0_V(bench, rows):
    """At 0 V before any bias each part reads its truth at the plan's conditions: the right
    channel, function, frequency and level. Cs = Cp*(1 + D^2) [published: impedance-measurement
    handbook relations]; the bench's truth is Cp."""
    firsts = [r for r in rows if r["step_index"] == "0"]
    assert len(firsts) == 2
    for r in firsts:
        C, D = float(r["C_F"]), float(r["D"])
        truth = bench.true_settled_C_F(int(r["channel"]), 0.0, freq_Hz=1e4, ac_level_Vrms=0.5)
        assert C / (1 + D * D) == pytest.approx(truth, rel=0.02), r["sample_id"]


def test_restarted_meter_is_set_up_again(tmp_path):
    # the meter restarts when its link drops during the second sample (message 51, after that
    # sample was configured): back at 1 kHz, 1 V, CPD unless the driver sets it up again
    result, bench, spy, planned = sweep(tmp_path, ["drop:after=50"], reset_on_drop=True)
    rows = read_rows(tmp_path / "run")
    assert result.status == "complete" and row_keys(rows) == planned
    after = spy.after_drop("meter")
    setup = after[: after.index("INITiate")]
    assert setup[0] == "*IDN?"
    for cmd in ("FUNCtion CSD", "SOURce:FREQuency 10000", "SOURce:VOLTage 0.5"):
        assert cmd in setup, setup
    m = bench.meter  # nothing after the drop set it but the reconnect
    assert (m.function, m.freq_Hz, m.ac_level_Vrms) == ("CSD", 10000.0, 0.5)
    check_truth_at_0_V(bench, rows)


def test_restarted_scanner_closes_the_sample_channel_again(tmp_path):
    # message 7 to the scanner is the error check right after ROUTe:CLOSe (@1): the scanner
    # restarts there (all channels open). Unless the channel is closed again, the first sample
    # is measured on an open fixture.
    result, bench, spy, planned = sweep(tmp_path, ["drop:role=scanner:after=6"], reset_on_drop=True)
    rows = read_rows(tmp_path / "run")
    assert result.status == "complete" and row_keys(rows) == planned
    after = spy.after_drop("scanner")
    assert after[0] == "*IDN?" and "ROUTe:CLOSe (@1)" in after[:6], after
    check_truth_at_0_V(bench, rows)


def test_restarted_supply_stops_the_sweep_instead_of_measuring_at_0_V(tmp_path):
    # a supply that restarted comes back with its output off: measuring on would log points
    # at 0 V as if biased. The sweep stops, safely, and says why.
    result, bench, spy, planned = sweep(tmp_path, ["drop:role=supply:after=60"], reset_on_drop=True)
    rows = read_rows(tmp_path / "run")
    meta = read_meta(tmp_path / "run")
    assert result.status == "aborted" and result.exit_code == 1 and result.supply_safe
    assert row_keys(rows) == planned[: len(rows)] and 0 < len(rows) < len(planned)
    assert all("bias_readback" not in flags_of(r) for r in rows)  # no 0 V point passed as biased
    assert "supply (TCPIP0::127.0.0.1::" in meta["reason"] and "output reads off" in meta["reason"]
    assert "check the supply" in meta["reason"]
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}


def dead_from(role: str, after: int, n: int = 300) -> list[str]:
    """Every message to `role` from message after+1 on is dropped: the instrument is gone."""
    return [f"drop:role={role}:after={after + k}" for k in range(n)]


def test_meter_gone_for_good_aborts_after_bounded_reconnects(tmp_path):
    result, bench, spy, planned = sweep(tmp_path, dead_from("meter", 40))
    rows = read_rows(tmp_path / "run")
    meta = read_meta(tmp_path / "run")
    assert result.status == "aborted" and result.exit_code == 1
    assert row_keys(rows) == planned[: len(rows)] and len(rows) == result.n_points >= 2
    reason = meta["reason"]
    assert "meter" in reason and "could not reopen it in 2 attempt(s)" in reason
    assert "check that the instrument is on and reachable" in reason
    assert re.search(r"\(while sending '[A-Za-z:*?]+'\)", reason), reason  # the command it was on
    assert result.supply_safe and bench.supply_state()["output_on"] is False
    assert bench.supply_state()["set_V"] == 0.0
    assert meta["events"][-1]["event"] == "abort"


def test_consecutive_timeouts_exhaust_the_retries_and_abort(tmp_path):
    faults = [f"timeout:after={40 + k}" for k in range(12)]
    result, bench, spy, planned = sweep(tmp_path, faults)
    rows = read_rows(tmp_path / "run")
    assert result.status == "aborted" and result.supply_safe
    assert row_keys(rows) == planned[: len(rows)] and len(rows) == result.n_points
    assert "meter" in result.reason
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}


def test_supply_gone_for_good_says_the_output_may_be_live(tmp_path, capsys):
    # the one case where the sweep cannot switch the bias off: it must say so, loudly
    result, bench, spy, planned = sweep(tmp_path, dead_from("supply", 60))
    err = capsys.readouterr().err
    meta = read_meta(tmp_path / "run")
    assert result.status == "aborted" and result.supply_safe is False
    assert bench.supply_state()["output_on"] is True  # really left on: the warning is true
    assert "output may still be live" in err and "supply (TCPIP0::127.0.0.1::" in err
    unsafe = [e for e in meta["events"] if e["event"] == "supply_not_confirmed_safe"]
    assert unsafe and "output may still be live" in unsafe[0]["detail"]
    rows = read_rows(tmp_path / "run")
    assert row_keys(rows) == planned[: len(rows)] and len(rows) == result.n_points


def test_error_queued_during_the_last_sample_is_not_missed(tmp_path):
    # message 55 to the meter is a FETCh? of the second (last) sample; no setting follows that
    # would read the queue, so the sweep reads it after each point: that point is not written
    # (it is measured again on resume) and no later point follows the error unflagged
    result, bench, spy, planned = sweep(tmp_path, ["error:after=54"])
    rows = read_rows(tmp_path / "run")
    assert [f.kind for f in bench.faults.fired] == ["error"]
    assert result.status == "aborted" and result.exit_code == 1 and result.supply_safe
    assert 0 < len(rows) < len(planned) and row_keys(rows) == planned[:len(rows)]
    assert "-222" in result.reason and "measuring FX-03" in result.reason
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
