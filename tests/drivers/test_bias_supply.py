"""Bias supply: settings, rate-limited ramps on a virtual clock, and safe_off.

Ramping and safe-off are `common practice` for biasing capacitors: never jump the bias,
always end at 0 V with the output off. Commands per instruments/COMMANDS.md.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings, strategies as st

from instruments.clock import VirtualClock
from instruments.drivers import BiasSupply, InvalidValueError
from instruments.drivers.fake import DROP, FakeResourceManager, Raise, open_sequence

RES = "TCPIP0::fake-supply::5026::SOCKET"
OK = '0,"No error"'
ERR = "SYSTem:ERRor?"


def supply(protocol, clock=None, **kw):
    rm = FakeResourceManager(open_sequence() + protocol, clock=clock)
    return BiasSupply(RES, rm=rm, backoff_s=0, **kw), rm


SAFE_OFF_TAIL = [("VOLTage 0", None), (ERR, OK), ("OUTPut OFF", None), (ERR, OK),
                 ("OUTPut?", "0"), ("VOLTage?", "0.000000000E+00")]


@pytest.mark.parametrize("name, value, sent", [
    ("voltage_V", 5.0, "VOLTage 5"), ("voltage_V", -60.0, "VOLTage -60"),
    ("voltage_V", 1.25, "VOLTage 1.25"), ("current_limit_A", 0.01, "CURRent 0.01"),
    ("current_limit_A", 1e-4, "CURRent 0.0001"), ("output_on", True, "OUTPut ON"),
    ("output_on", False, "OUTPut OFF"),
])
def test_each_setting_sends_its_command_then_reads_the_error_queue(name, value, sent):
    s, rm = supply([(sent, None), (ERR, OK)])
    s.open()
    setattr(s, name, value)
    s.close()
    rm.assert_done()


@pytest.mark.parametrize("name, query, reply, expect", [
    ("voltage_V", "VOLTage?", "5.000000000E+00", 5.0),
    ("current_limit_A", "CURRent?", "1.000000000E-02", 0.01),
    ("output_on", "OUTPut?", "1", True), ("output_on", "OUTPut?", "0", False),
    ("measured_voltage_V", "MEASure:VOLTage?", "4.990000000E+00", 4.99),
    ("measured_current_A", "MEASure:CURRent?", "1.200000000E-07", 1.2e-7),
])
def test_each_setting_queries_and_parses(name, query, reply, expect):
    s, rm = supply([(query, reply)])
    s.open()
    assert getattr(s, name) == expect
    s.close()
    rm.assert_done()


@pytest.mark.parametrize("name, value", [
    ("voltage_V", 60.01), ("voltage_V", -61), ("current_limit_A", 0.0),
    ("current_limit_A", 1.5), ("output_on", 1), ("output_on", "ON"),
])
def test_out_of_range_or_wrong_type_refused_before_writing(name, value):
    s, rm = supply([])
    s.open()
    with pytest.raises(InvalidValueError):
        setattr(s, name, value)
    s.close()
    rm.assert_done()


def _ramp_protocol(start, values):
    p = [("VOLTage?", f"{start:.9E}")]
    for v in values:
        p += [(f"VOLTage {v:.12g}", None), (ERR, OK)]
    return p


def _sent_steps(rm):
    """(clock time, V) of every VOLTage command the fake received."""
    return [(t, float(m.split()[1])) for t, m in rm.writes if m.startswith("VOLTage ")]


def test_ramp_steps_and_rate_exact_protocol():
    # 0 -> 2 V at 1 V/s with steps of at most 0.5 V: four steps, 0.5 s apart
    clock = VirtualClock()
    s, rm = supply(_ramp_protocol(0.0, [0.5, 1.0, 1.5, 2.0]), clock=clock)
    s.open()
    log = s.ramp_to(2.0, 1.0, clock)
    assert [v for _, v in log] == [0.0, 0.5, 1.0, 1.5, 2.0]
    assert clock.now() == pytest.approx(2.0, rel=1e-6)
    s.close()
    rm.assert_done()


@settings(max_examples=60, deadline=None)
@given(start=st.floats(-60, 60), target=st.floats(-60, 60),
       rate=st.floats(0.01, 100.0), step=st.floats(0.01, 5.0))
def test_ramp_rate_and_step_never_exceeded(start, target, rate, step):
    # common practice: |dV| per step <= max_step and |dV|/dt <= max_rate between any two
    # consecutive programmed values, the value before the ramp included
    clock = VirtualClock(start_s=100.0)
    s, _ = supply([], clock=clock)
    sent: list[tuple[float, float]] = []

    class Rec:
        timeout = 5000

        def write(self, msg):
            if msg.startswith("VOLTage "):
                sent.append((clock.now(), float(msg.split()[1])))
            self.last = msg

        def read(self):
            if self.last == "VOLTage?":
                return f"{start:.17g}"
            return '0,"No error"'

        def close(self):
            pass

    s.session._res, s.session._user_open = Rec(), True
    s.ramp_to(target, rate, clock, max_step_V=step)
    points = [(100.0, start)] + sent
    assert points[-1][1] == pytest.approx(target, abs=1e-9)
    for (t0, v0), (t1, v1) in zip(points, points[1:]):
        assert abs(v1 - v0) <= step * (1 + 1e-9) + 1e-9
        assert abs(v1 - v0) <= rate * (t1 - t0) * (1 + 1e-9) + 1e-9
        assert -60 <= v1 <= 60


def test_ramp_recorded_on_the_virtual_clock_never_exceeds_the_rate():
    clock = VirtualClock()
    s, rm = supply(_ramp_protocol(1.0, [0.3, -0.4, -1.1, -1.8, -2.5]), clock=clock)
    s.open()
    s.ramp_to(-2.5, 0.7, clock, max_step_V=0.7)
    steps = [(0.0, 1.0)] + _sent_steps(rm)
    rates = [abs(v1 - v0) / (t1 - t0) for (t0, v0), (t1, v1) in zip(steps, steps[1:])]
    assert max(rates) <= 0.7 and len(rates) == 5
    s.close()
    rm.assert_done()


@pytest.mark.parametrize("args", [(61.0, 1.0), (5.0, 0.0), (5.0, -1.0), (5.0, float("nan")),
                                  ("5;OUTP ON", 1.0), (5.0, "fast")])
def test_ramp_arguments_refused_before_anything_is_written(args):
    clock = VirtualClock()
    s, rm = supply([], clock=clock)
    s.open()
    with pytest.raises(InvalidValueError):
        s.ramp_to(*args, clock)
    s.close()
    rm.assert_done()


def test_ramp_refuses_a_zero_step():
    clock = VirtualClock()
    s, rm = supply([], clock=clock)
    s.open()
    with pytest.raises(InvalidValueError):
        s.ramp_to(1.0, 1.0, clock, max_step_V=0)
    s.close()
    rm.assert_done()


def test_safe_off_without_clock_sets_0V_output_off_and_verifies():
    s, rm = supply(SAFE_OFF_TAIL)
    s.open()
    assert s.safe_off() is True and s.last_safe_off_error is None
    s.close()
    rm.assert_done()


def test_safe_off_with_clock_ramps_down_first():
    clock = VirtualClock()
    s, rm = supply(_ramp_protocol(1.0, [0.5, 0.0]) + SAFE_OFF_TAIL[2:], clock=clock)
    s.open()
    assert s.safe_off(clock, 1.0) is True
    assert _sent_steps(rm) == [(pytest.approx(0.5), 0.5), (pytest.approx(1.0), 0.0)]
    s.close()
    rm.assert_done()


def test_safe_off_returns_false_when_output_still_reads_on():
    s, rm = supply(SAFE_OFF_TAIL[:4] + [("OUTPut?", "1"), ("VOLTage?", "0")])
    s.open()
    assert s.safe_off() is False
    assert "output still reads back on" in s.last_safe_off_error
    s.close()
    rm.assert_done()


def test_safe_off_on_a_dead_link_returns_false_and_does_not_raise():
    # the link drops after VOLTage 0 and nothing answers a reopen: each of the three steps
    # (error check of the 0 V set, OUTPut OFF, the OUTPut? verification) tries to reopen
    # twice (reconnects=2), then safe_off gives up with False and the reason kept
    refused = ConnectionRefusedError(111, "Connection refused")
    s, rm = supply([("VOLTage 0", DROP)] + [("@open", refused)] * 6, reconnects=2)
    s.open()
    assert s.safe_off() is False
    reason = s.last_safe_off_error
    assert RES in reason and "Connection refused" in reason
    assert "switching the output off failed" in reason and "switch the supply off" in reason
    s.close()
    rm.assert_done()


def test_safe_off_never_raises_even_if_the_backend_raises_something_odd():
    s, rm = supply([("VOLTage 0", Raise(RuntimeError("backend bug")))]
                   + [("@open", OSError("no route to host"))] * 6, reconnects=2)
    s.open()
    assert s.safe_off() is False
    assert "no route to host" in s.last_safe_off_error
    s.close()
    rm.assert_done()


def test_safe_off_on_a_never_opened_supply_that_cannot_be_reached():
    s, rm = supply([])
    rm.protocol = [("@open", ConnectionRefusedError(111, "Connection refused"))]
    assert s.safe_off() is False
    assert "could not open the link" in s.last_safe_off_error
    rm.assert_done()


def test_leaving_with_block_calls_safe_off_even_after_an_exception():
    s, rm = supply([("OUTPut ON", None), (ERR, OK)] + SAFE_OFF_TAIL)
    with pytest.raises(ZeroDivisionError):
        with s:
            s.output_on = True
            1 / 0
    assert not s.is_open
    rm.assert_done()


def test_leaving_after_a_ramp_ramps_down_at_the_same_rate():
    clock = VirtualClock()
    # the ramp down starts from the 1 V this driver programmed and saw accepted: no VOLTage?
    s, rm = supply(_ramp_protocol(0.0, [0.5, 1.0]) + _ramp_protocol(1.0, [0.5, 0.0])[1:]
                   + SAFE_OFF_TAIL[2:], clock=clock)
    with s:
        s.ramp_to(1.0, 0.5, clock)
    steps = _sent_steps(rm)
    assert [v for _, v in steps] == [0.5, 1.0, 0.5, 0.0]
    assert [t for t, _ in steps] == pytest.approx([1.0, 2.0, 3.0, 4.0])
    rm.assert_done()


def test_reconnect_reapplies_limit_then_voltage_never_the_output():
    # common practice: a driver never switches a bias output on by itself
    s, rm = supply([("VOLTage 3", None), (ERR, OK), ("CURRent 0.005", None), (ERR, OK),
                    ("OUTPut ON", None), (ERR, OK),
                    *open_sequence()[:3], ("CURRent 0.005", None), (ERR, OK),
                    ("VOLTage 3", None), (ERR, OK)])
    s.open()
    s.voltage_V, s.current_limit_A, s.output_on = 3.0, 0.005, True
    s.reconnect()
    s.close()
    rm.assert_done()


def test_ctrl_c_during_the_ramp_down_still_ends_at_0V_output_off_then_passes_on():
    # common practice: an interrupt of the shutdown ramp must not leave the output on
    class InterruptingClock(VirtualClock):
        def sleep(self, seconds):
            if self.now() >= 0.5:
                raise KeyboardInterrupt
            super().sleep(seconds)

    clock = InterruptingClock()
    s, rm = supply([("VOLTage?", "2.0"), ("VOLTage 1.5", None), (ERR, OK)] + SAFE_OFF_TAIL,
                   clock=clock)
    s.open()
    with pytest.raises(KeyboardInterrupt):
        s.safe_off(clock, 1.0)
    s.close()
    rm.assert_done()


def test_ctrl_c_between_write_and_read_marks_the_stream_for_resync():
    class Interrupt(BaseException):
        pass

    s, rm = supply([("VOLTage?", "2.0"), ("*CLS", None), ("*OPC?", "1"),
                    ("VOLTage?", "3.0")])
    s.open()
    real_read = rm.current.read
    rm.current.read = lambda: (_ for _ in ()).throw(Interrupt())
    with pytest.raises(Interrupt):
        s.voltage_V
    rm.current.read = real_read
    assert s.voltage_V == 3.0                     # the pending '2.0' was discarded
    assert s.session.counters["stale_lines"] == 1
    s.close()
    rm.assert_done()


def test_a_ramp_step_lost_with_the_link_is_reapplied_so_no_step_doubles():
    clock = VirtualClock()
    s, rm = supply([("VOLTage?", "0.0"), ("VOLTage 0.5", None), (ERR, OK),
                    ("VOLTage 1", DROP),                      # lost with the link
                    *open_sequence()[:3], ("VOLTage 1", None), (ERR, OK),   # re-applied
                    (ERR, OK),                                # the retried error check
                    ("VOLTage 1.5", None), (ERR, OK)], clock=clock)
    s.open()
    s.ramp_to(1.5, 1.0, clock)
    assert s.session.counters["reconnects"] == 1
    s.close()
    rm.assert_done()


def test_time_spent_at_the_end_of_a_ramp_counts_towards_the_next_ramps_first_pause():
    # common practice: the rate bounds |dV|/dt between consecutive programmed values; a
    # dwell at the last value is such time, so after 3 s at 1 V a 0.5 V step at 1 V/s may
    # come at once, and the step after it still waits its 0.5 s
    clock = VirtualClock()
    s, rm = supply(_ramp_protocol(0.0, [0.5, 1.0]) + _ramp_protocol(1.0, [1.5, 2.0])[1:],
                   clock=clock)
    s.open()
    s.ramp_to(1.0, 1.0, clock)
    clock.sleep(3.0)
    s.ramp_to(2.0, 1.0, clock)
    steps = [(0.0, 0.0)] + _sent_steps(rm)
    assert [t for t, _ in steps] == pytest.approx([0.0, 0.5, 1.0, 4.0, 4.5])
    for (t0, v0), (t1, v1) in zip(steps, steps[1:]):
        assert abs(v1 - v0) <= 1.0 * (t1 - t0) * (1 + 1e-6)
    s.close()
    rm.assert_done()


def test_a_set_outside_a_ramp_takes_away_the_time_credit():
    clock = VirtualClock()
    s, rm = supply(_ramp_protocol(0.0, [0.5]) + [("VOLTage 0.5", None), (ERR, OK)]
                   + _ramp_protocol(0.5, [1.0])[1:], clock=clock)
    s.open()
    s.ramp_to(0.5, 1.0, clock)
    clock.sleep(3.0)
    s.voltage_V = 0.5  # a set just now: the next step waits its whole pause
    s.ramp_to(1.0, 1.0, clock)
    assert _sent_steps(rm)[-1][0] == pytest.approx(4.0)
    s.close()
    rm.assert_done()
