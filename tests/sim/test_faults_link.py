"""Each fault kind as a pyvisa-py client sees it (contract section 6).

Sources: the pyvisa pitfalls in the project's style notes (a timed-out query leaves its late
reply in the buffer; a closed link shows up as an I/O error; common practice), SCPI-1999
vol. 1, 7.2.1.5 (from memory) for the overrange value 9.9E37, the CV/CC behaviour of a
bench supply (common practice).
"""

from __future__ import annotations

import time

import pytest
import pyvisa
from pyvisa.errors import VisaIOError

from instruments.clock import VirtualClock
from instruments.sim import Fault, SimBench
from benchkit.commands.sim import demo_bench


@pytest.fixture
def bench():
    with demo_bench(clock=VirtualClock()) as b:
        yield b


def open_res(rm, resource, timeout_ms=3000):
    return rm.open_resource(resource, read_termination="\n", write_termination="\n",
                            timeout=timeout_ms, open_timeout=3000)


IDN_METER = "benchkit-sim,SIM-LCR,"


def test_timeout_swallows_one_reply(rm, bench):
    # common practice: a lost reply is a client timeout; the link then works again
    m = open_res(rm, bench.resources["meter"], timeout_ms=300)
    try:
        bench.inject("timeout:after=1")
        m.write("SOUR:FREQ 120")          # message 1 passes
        with pytest.raises(VisaIOError) as info:
            m.query("*IDN?")              # message 2: executed, reply swallowed
        assert info.value.error_code == pyvisa.constants.StatusCode.error_timeout
        assert m.query("*IDN?").startswith(IDN_METER)   # no stale reply left behind
        assert float(m.query("SOUR:FREQ?")) == 120.0
    finally:
        m.close()


def test_drop_closes_the_link_once_and_state_survives(rm, bench):
    # common practice: the instrument closed the link; a new connection finds its settings
    m = open_res(rm, bench.resources["meter"], timeout_ms=500)
    bench.inject(Fault.parse("drop:after=2"))
    m.write("SOUR:FREQ 120")
    assert m.query("*IDN?").startswith(IDN_METER)
    with pytest.raises(VisaIOError):
        m.query("*IDN?")     # message 3: the server closes the connection instead
    m.close()
    m = open_res(rm, bench.resources["meter"])
    try:
        assert float(m.query("SOUR:FREQ?")) == 120.0
        assert m.query("*IDN?").startswith(IDN_METER)   # fired once only
    finally:
        m.close()


def test_garble_cuts_one_reply(rm, bench):
    # common practice: a corrupted reply must be recognised by the driver, not parsed
    m = open_res(rm, bench.resources["meter"])
    try:
        good = m.query("*IDN?")
        bench.inject("garble")
        bad = m.query("*IDN?")
        assert bad != good and bad.endswith("#~") and len(bad) < len(good)
        assert good.startswith(bad[:-2])
        assert m.query("*IDN?") == good
    finally:
        m.close()


def test_error_fault_leaves_an_error_in_the_queue(rm, bench):
    # SCPI-1999 vol. 2, 21.8: the queued code is what SYSTem:ERRor? reports, oldest first
    s = open_res(rm, bench.resources["supply"])
    try:
        bench.inject("error:after=1:role=supply:code=-222")
        s.write("VOLT 1")
        assert s.query("SYST:ERR?") == '-222,"Data out of range; injected fault"'
        assert s.query("SYST:ERR?") == '0,"No error"'
        assert float(s.query("VOLT?")) == 1.0   # the message itself ran normally
    finally:
        s.close()


def test_late_reply_arrives_after_the_timeout_and_waits_in_the_buffer(rm, bench):
    # style notes (pyvisa pitfalls): a timed-out query leaves its late reply for the next read
    m = open_res(rm, bench.resources["meter"], timeout_ms=200)
    try:
        bench.inject("late:delay=0.6")
        m.write("SOUR:FREQ 500")
        with pytest.raises(VisaIOError):
            m.query("SOUR:FREQ?")
        time.sleep(0.8)   # real time: the reply is on its way
        m.timeout = 2000
        assert float(m.read()) == 500.0   # the stale reply of the earlier query
        assert m.query("*IDN?").startswith(IDN_METER)
    finally:
        m.close()


def test_overload_answers_the_overrange_value_for_count_readings(rm, bench):
    # SCPI-1999 vol. 1, 7.2.1.5 (from memory): 9.9E37 stands for overrange
    m = open_res(rm, bench.resources["meter"])
    sc = open_res(rm, bench.resources["scanner"])
    try:
        sc.write("ROUT:CLOS (@1)")
        assert sc.query("*OPC?") == "1"
        bench.inject("overload:count=2")
        readings = [tuple(float(x) for x in m.query("READ?").split(",")) for _ in range(3)]
        assert readings[0] == readings[1] == (9.9e37, 9.9e37)
        assert 1e-7 < readings[2][0] < 1e-4
    finally:
        m.close()
        sc.close()


def test_current_limit_fault_sags_the_supply_and_stays(rm, bench):
    # common practice (CV/CC): a limit below the part's leakage at the set voltage keeps the
    # supply in current limit; terminal V sags and stays below the setting
    s = open_res(rm, bench.resources["supply"])
    sc = open_res(rm, bench.resources["scanner"])
    try:
        sc.write("ROUT:CLOS (@1)")   # 10 uF, insulation R*C = 100 s: 10 Mohm (data/parts.toml)
        assert sc.query("*OPC?") == "1"
        s.write("VOLT 0;OUTP ON")
        assert s.query("*OPC?") == "1"   # counted messages are the ones the bench has seen
        bench.inject("current-limit:after=0")
        s.write("VOLT 5")            # the next message: the limit drops to 1e-7 A from here on
        for _ in range(3):
            bench.clock.sleep(600)
            V = float(s.query("MEAS:VOLT?"))
            assert V < 2.0
            assert float(s.query("MEAS:CURR?")) == pytest.approx(1e-7)
        assert float(s.query("CURR?")) == 0.01   # the programmed limit is unchanged
        assert bench.supply_state()["terminal_V"] < 2.0
    finally:
        s.close()
        sc.close()


def test_temp_drift_ramps_the_chamber_from_the_trigger_on(rm, bench):
    # faults.py: rate in degC per clock minute, from the triggering message on
    th = open_res(rm, bench.resources["thermometer"])
    try:
        bench.inject("temp-drift:rate=0.5:after=1")
        t0 = float(th.query("MEAS:TEMP?"))    # message 1: before the drift
        bench.clock.sleep(60)
        t1 = float(th.query("MEAS:TEMP?"))    # message 2: drift starts now
        bench.clock.sleep(600)
        t2 = float(th.query("MEAS:TEMP?"))
        assert abs(t0 - 25.0) < 0.2 and abs(t1 - 25.0) < 0.2
        assert t2 - 25.0 == pytest.approx(5.0, abs=0.2)
    finally:
        th.close()


def test_faults_given_at_construction_are_armed_at_start(rm):
    # contract section 2: SimBench(..., faults=...) / demo_bench(faults=...)
    with demo_bench(clock=VirtualClock(), faults=[Fault.parse("garble:after=1")]) as b:
        m = open_res(rm, b.resources["meter"])
        try:
            assert m.query("*IDN?").startswith(IDN_METER)
            assert m.query("*IDN?").endswith("#~")
            assert [f.kind for f in b.faults.fired] == ["garble"]
        finally:
            m.close()
