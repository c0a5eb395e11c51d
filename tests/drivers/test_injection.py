"""No field of a plan or a part can put a second command into the stream.

SCPI-1999 vol. 1, 6.x: ';' separates message units and the terminator (LF) ends a message,
so either inside a value would smuggle in a command of its own. Every value is checked for
type, finiteness and range or membership before a command is built; anything refused must
leave the wire untouched.
"""

from __future__ import annotations

import math
import re

import pytest
from hypothesis import given, settings, strategies as st

from instruments.drivers import (BiasSupply, InvalidValueError, LCRMeter, Scanner,
                                 load_profile)
from instruments.drivers.fake import FakeResourceManager, open_sequence
from instruments.drivers.profile import CommandTemplate

RES = "TCPIP0::fake::5025::SOCKET"

hostile_text = st.one_of(
    st.sampled_from(["1;*RST", "1\nOUTP ON", "CPD;OUTP ON", "CPD\n", "1e3 ", "ON;*RST",
                     "(@1);ROUT:CLOS (@2)", "1,2", "", " CPD", "CPD\r"]),
    st.text(max_size=20))
not_a_number = st.one_of(hostile_text, st.none(), st.booleans(), st.lists(st.floats()),
                         st.just(math.nan), st.just(math.inf), st.just(-math.inf))


def opened(cls):
    rm = FakeResourceManager(open_sequence())
    d = cls(RES, rm=rm, backoff_s=0)
    d.open()
    return d, rm


@settings(max_examples=150, deadline=None)
@given(value=not_a_number,
       target=st.sampled_from([(LCRMeter, "freq_Hz"), (LCRMeter, "ac_level_Vrms"),
                               (BiasSupply, "voltage_V"), (BiasSupply, "current_limit_A")]))
def test_numeric_settings_refuse_anything_but_a_finite_number(value, target):
    cls, name = target
    d, rm = opened(cls)
    with pytest.raises(InvalidValueError):
        setattr(d, name, value)
    assert rm.sent == ["*IDN?", "*CLS", "SYSTem:ERRor?"]
    d.close()
    rm.assert_done()


@settings(max_examples=150, deadline=None)
@given(value=st.one_of(hostile_text, st.integers(), st.none(), st.booleans()))
def test_enum_setting_refuses_anything_outside_its_set(value):
    if isinstance(value, str) and value.upper() in ("CPD", "CSRS", "CSD"):
        return
    d, rm = opened(LCRMeter)
    with pytest.raises(InvalidValueError):
        d.function = value
    rm.assert_done()


@settings(max_examples=100, deadline=None)
@given(value=st.one_of(hostile_text, st.integers(), st.floats(), st.none()))
def test_bool_setting_accepts_only_true_or_false(value):
    d, rm = opened(BiasSupply)
    with pytest.raises(InvalidValueError):
        d.output_on = value
    d.close()
    rm.assert_done()


@settings(max_examples=150, deadline=None)
@given(value=st.one_of(hostile_text, st.floats(), st.integers(max_value=0),
                       st.integers(min_value=17), st.booleans(), st.none()))
def test_channel_must_be_a_whole_number_within_the_profile(value):
    d, rm = opened(Scanner)
    with pytest.raises(InvalidValueError):
        d.select(value)
    rm.assert_done()


@settings(max_examples=300, deadline=None)
@given(v=st.floats(20, 2e6))
def test_every_accepted_float_formats_to_a_plain_scpi_number(v):
    # SCPI-1999 vol. 1, 7.2: <NRf> decimal numeric data, nothing else in the command
    setting = LCRMeter.freq_Hz
    spec = load_profile("generic-lcr").settings["freq_Hz"]
    cmd = setting.command(spec, setting.validate(spec, v, "test"))
    assert re.fullmatch(r"SOURce:FREQuency [0-9eE+\-.]+", cmd)
    assert float(cmd.split()[1]) == pytest.approx(v, rel=1e-11)


def test_a_template_refuses_a_filled_in_value_with_a_separator():
    # defence in depth: even a value that skipped validation cannot leave the template
    t = CommandTemplate("ROUTe:CLOSe (@{channel})", ("channel",), "test")
    with pytest.raises(InvalidValueError):
        t.format(channel="1);*RST;(@2")
    with pytest.raises(InvalidValueError):
        t.format(channel="1)\n*RST")
