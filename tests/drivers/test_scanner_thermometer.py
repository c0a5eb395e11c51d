"""Scanner and thermometer: exact command/reply conversations (instruments/COMMANDS.md)."""

from __future__ import annotations

import pytest

from instruments.drivers import InstrumentError, InvalidValueError, Scanner, Thermometer
from instruments.drivers.fake import FakeResourceManager, open_sequence

RES = "TCPIP0::fake-scanner::5027::SOCKET"
OK = '0,"No error"'
ERR = "SYSTem:ERRor?"


def scanner(protocol):
    rm = FakeResourceManager(open_sequence() + protocol)
    return Scanner(RES, rm=rm, backoff_s=0), rm


def test_select_opens_all_then_closes_one_checking_errors_after_each():
    # break before make: ROUTe:OPEN:ALL first (SCPI-1999 ROUTe subsystem, channel list (@n))
    sc, rm = scanner([("ROUTe:OPEN:ALL", None), (ERR, OK), ("ROUTe:CLOSe (@3)", None),
                      (ERR, OK)])
    with sc:
        sc.select(3)
        assert sc.selected_channel == 3
    rm.assert_done()


def test_select_stops_if_opening_all_reported_an_error():
    sc, rm = scanner([("ROUTe:OPEN:ALL", None), (ERR, '-221,"Settings conflict"'),
                      (ERR, OK)])
    with sc:
        with pytest.raises(InstrumentError, match="ROUTe:OPEN:ALL"):
            sc.select(2)
        assert sc.selected_channel is None
    rm.assert_done()


def test_open_all_open_channel_and_is_closed():
    sc, rm = scanner([("ROUTe:OPEN:ALL", None), (ERR, OK), ("ROUTe:OPEN (@16)", None),
                      (ERR, OK), ("ROUTe:CLOSe? (@1)", "1"), ("ROUTe:CLOSe? (@2)", "0")])
    with sc:
        sc.open_all()
        sc.open_channel(16)
        assert sc.is_closed(1) is True
        assert sc.is_closed(2) is False
    rm.assert_done()


@pytest.mark.parametrize("channel", [0, 17, -1, 1.0, "3", "1);ROUTe:CLOSe (@2", True, None])
def test_bad_channels_refused_before_writing(channel):
    sc, rm = scanner([])
    with sc:
        for call in (sc.select, sc.open_channel, sc.is_closed):
            with pytest.raises(InvalidValueError):
                call(channel)
    rm.assert_done()


def test_channels_range_from_profile():
    sc, _ = scanner([])
    assert list(sc.channels) == list(range(1, 17))


def test_reconnect_reselects_the_channel():
    sc, rm = scanner([("ROUTe:OPEN:ALL", None), (ERR, OK), ("ROUTe:CLOSe (@5)", None),
                      (ERR, OK), *open_sequence()[:3],
                      ("ROUTe:OPEN:ALL", None), (ERR, OK), ("ROUTe:CLOSe (@5)", None),
                      (ERR, OK)])
    with sc:
        sc.select(5)
        sc.reconnect()
    rm.assert_done()


def test_thermometer_reads_temperature():
    rm = FakeResourceManager(open_sequence() + [("MEASure:TEMPerature?", "2.512000000E+01")])
    with Thermometer("TCPIP0::fake-thermo::5028::SOCKET", rm=rm, backoff_s=0) as t:
        assert t.temperature_C == 25.12
        with pytest.raises(AttributeError):
            t.temperature_C = 30.0
    rm.assert_done()
