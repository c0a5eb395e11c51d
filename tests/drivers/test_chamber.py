"""Temperature chamber driver: exact command/reply conversations (instruments/COMMANDS.md).

Sending a chamber back to a safe temperature on every exit path is `common practice` for
climate testing (hot and cold surfaces, condensation below the dew point).
"""

from __future__ import annotations

import pytest

from instruments.drivers import InstrumentError, InvalidValueError, TemperatureChamber
from instruments.drivers.fake import DROP, FakeResourceManager, open_sequence

RES = "TCPIP0::fake-chamber::5029::SOCKET"
OK = '0,"No error"'
ERR = "SYSTem:ERRor?"


def chamber(protocol, **kw):
    rm = FakeResourceManager(open_sequence() + protocol)
    return TemperatureChamber(RES, rm=rm, backoff_s=0, **kw), rm


def test_go_to_sets_the_rate_first_then_the_set_point():
    ch, rm = chamber([("SOURce:TEMPerature:RATE 0.05", None), (ERR, OK),
                      ("SOURce:TEMPerature 85", None), (ERR, OK)])
    with ch:
        ch.go_to(85.0, 0.05)
    rm.assert_done()


def test_readings_and_state_tokens():
    ch, rm = chamber([("MEASure:TEMPerature?", "8.412000000E+01"), ("STATus:TEMPerature?", "SETT"),
                      ("STATus:TEMPerature?", "STAB"), ("SOURce:TEMPerature?", "8.5E+01")])
    with ch:
        assert ch.temperature_C == 84.12
        assert ch.state == "SETTLE"
        assert ch.is_stable()
        assert ch.setpoint_C == 85.0
    rm.assert_done()


@pytest.mark.parametrize("value", [-80.0, 200.0, float("nan"), "85", True, None])
def test_set_points_outside_the_profile_range_are_refused_before_sending(value):
    ch, rm = chamber([])
    with ch:
        with pytest.raises(InvalidValueError):
            ch.setpoint_C = value
    rm.assert_done()


def test_a_refused_set_point_raises_with_the_error_queue():
    # SCPI-1999 vol. 2, 21.8: -221 Settings conflict
    ch, rm = chamber([("SOURce:TEMPerature 125", None), (ERR, '-221,"Settings conflict"'),
                      (ERR, OK)])
    with ch:
        with pytest.raises(InstrumentError, match="-221"):
            ch.setpoint_C = 125.0
        assert "setpoint_C" not in ch.remembered
    rm.assert_done()


def test_safe_return_confirms_the_set_point():
    ch, rm = chamber([("SOURce:TEMPerature 25", None), (ERR, OK),
                      ("SOURce:TEMPerature?", "2.5E+01")])
    with ch:
        assert ch.safe_return(25.0) is True
        assert ch.last_safe_error is None
    rm.assert_done()


def test_safe_return_never_raises_and_says_what_failed():
    ch, rm = chamber([("SOURce:TEMPerature 25", None), (ERR, '-221,"Settings conflict"'),
                      (ERR, OK), ("SOURce:TEMPerature?", "1.25E+02")])
    with ch:
        assert ch.safe_return(25.0) is False
    assert "reads back 125 degC" in ch.last_safe_error
    assert "by hand" in ch.last_safe_error
    rm.assert_done()


def test_safe_return_on_a_dead_link_returns_false():
    ch, rm = chamber([("SOURce:TEMPerature 25", DROP)], retries=0, reconnects=0)
    with ch:
        assert ch.safe_return(25.0) is False
    assert ch.last_safe_error and "25 degC" in ch.last_safe_error
