"""The SCPI parser of the simulated instruments, without a network.

Sources: SCPI-1999 vol. 1 (command syntax, numeric and boolean program data, channel lists)
and vol. 2 ch. 21 (error queue); IEEE 488.2-1992 (common commands, message units, the event
status register). Clause numbers are from memory where marked.
"""

from __future__ import annotations

import pytest
from hypothesis import given, settings, strategies as st

from instruments.sim.scpi import (
    ERROR_QUEUE_SIZE, ErrorQueue, ScpiError, ScpiInstrument, format_float, parse_bool,
    parse_channel_list, parse_number,
)


class _Toy(ScpiInstrument):
    """A small instrument with one numeric setting, one boolean and one set-only command."""

    model = "SIM-TOY"
    role = "meter"

    def reset(self):
        self.level = 1.0
        self.state = False
        self.triggered = 0

    def _register(self):
        self.add_number("SOURce:VOLTage[:LEVel][:IMMediate]", lambda: self.level,
                        lambda v: setattr(self, "level", v), 0.005, 2.0, 1.0, "level")
        self.commands.add("OUTPut[:STATe]", set=lambda a: setattr(self, "state", parse_bool(a[0])),
                          query=lambda a: "1" if self.state else "0")
        self.commands.add("INITiate[:IMMediate]", set=lambda a: self._trigger(), set_args=(0, 0))

    def _trigger(self):
        self.triggered += 1


@pytest.fixture
def toy():
    return _Toy("T-1")


def errors(inst):
    """Drain the error queue, oldest first."""
    out = []
    while True:
        code, text = inst.errors.pop()
        if code == 0:
            return out
        out.append((code, text))


# --- headers -------------------------------------------------------------------------------

@pytest.mark.parametrize("header", [
    "SOUR:VOLT", "SOURCE:VOLTAGE", "sour:volt", "Source:Voltage:Level", "SOUR:VOLT:LEV:IMM",
    ":SOUR:VOLT", "SOURce:VOLTage:IMMediate",
])
def test_short_long_and_optional_nodes_reach_the_same_setting(toy, header):
    # SCPI-1999 vol. 1, 6.2.1 (from memory): short form = the upper-case letters, long form
    # = the whole mnemonic, case-insensitive; [nodes] may be left out.
    assert toy.handle(f"{header} 0.5") is None
    assert toy.level == 0.5
    assert toy.handle(f"{header}?") == format_float(0.5)
    assert errors(toy) == []


@pytest.mark.parametrize("header", ["SOU:VOLT", "SOURC:VOLT", "VOLT", "SOUR:VOLTS", "SOUR::VOLT"])
def test_neither_short_nor_long_form_is_an_undefined_header(toy, header):
    # SCPI-1999 vol. 1, 6.2.1: only the short or the complete long form is accepted;
    # SCPI-1999 vol. 2, 21.8.9: -113 Undefined header. ("::" is a syntax error, -102.)
    toy.handle(f"{header} 0.5")
    (code, _text), = errors(toy)
    assert code in (-113, -102)
    assert toy.level == 1.0


def test_compound_message_with_relative_header_and_joined_answers(toy):
    # IEEE 488.2 7.6 / SCPI-1999 vol. 1, 6.2.4 (from memory): units separated by ';', a
    # unit without ':' continues at the previous unit's node; common commands keep the path.
    # IEEE 488.2 8.4: the answers of several queries form one line joined by ';'.
    reply = toy.handle("SOUR:VOLT 0.25;VOLT?;*OPC?;:OUTP ON;OUTP?")
    assert reply == f"{format_float(0.25)};1;1"
    assert toy.state is True
    assert errors(toy) == []


def test_first_error_ends_the_message(toy):
    # IEEE 488.2 6.1.6 (from memory): after a parser error the rest of the message is skipped.
    toy.handle("SOUR:VOLT 0.5;BOGUS;SOUR:VOLT 0.7")
    assert toy.level == 0.5
    assert [c for c, _ in errors(toy)] == [-113]


# --- parameters ----------------------------------------------------------------------------

@pytest.mark.parametrize("text,value", [
    ("1", 1.0), ("1.0", 1.0), ("1e-1", 0.1), ("1E-01", 0.1), ("+.5", 0.5), ("2.", 2.0),
    ("MIN", 0.005), ("minimum", 0.005), ("MAX", 2.0), ("Maximum", 2.0), ("DEF", 1.0),
])
def test_decimal_numeric_program_data(toy, text, value):
    # SCPI-1999 vol. 1, 7.2 (from memory): <NRf> forms and the MINimum/MAXimum/DEFault keywords.
    toy.handle(f"SOUR:VOLT {text}")
    assert toy.level == pytest.approx(value)
    assert errors(toy) == []


def test_query_of_limits(toy):
    # SCPI-1999 vol. 1, 7.2.1 (from memory): <header>? MIN|MAX answers the limit.
    assert toy.handle("SOUR:VOLT? MIN") == format_float(0.005)
    assert toy.handle("SOUR:VOLT? MAX") == format_float(2.0)


@pytest.mark.parametrize("text,code", [
    ("3", -222), ("-1", -222), ("0.001", -222),            # -222 Data out of range
    ("abc", -104), ("1V", -104), ("nan", -104), ("0x10", -104),  # -104 Data type error
])
def test_bad_numbers(toy, text, code):
    # SCPI-1999 vol. 2, 21.8.9 / 21.8.10: -104 for the wrong kind of data, -222 out of range.
    toy.handle(f"SOUR:VOLT {text}")
    assert [c for c, _ in errors(toy)] == [code]
    assert toy.level == 1.0


def test_missing_and_extra_parameters(toy):
    # SCPI-1999 vol. 2, 21.8.9: -109 Missing parameter, -108 Parameter not allowed.
    toy.handle("SOUR:VOLT")
    toy.handle("SOUR:VOLT 1,2")
    toy.handle("INIT 1")
    assert [c for c, _ in errors(toy)] == [-109, -108, -108]
    assert toy.triggered == 0


@pytest.mark.parametrize("text,state", [("ON", True), ("on", True), ("1", True), ("OFF", False),
                                        ("0", False), ("0.4", False), ("2", True)])
def test_booleans_answered_one_and_zero(toy, text, state):
    # SCPI-1999 vol. 1, 7.3 (from memory): ON|OFF or a number rounded, non-zero = ON;
    # a boolean query answers 1 or 0.
    toy.handle(f"OUTP {text}")
    assert toy.handle("OUTP?") == ("1" if state else "0")
    assert errors(toy) == []


def test_bad_boolean():
    with pytest.raises(ScpiError) as info:
        parse_bool("MAYBE")
    assert info.value.code == -224


@pytest.mark.parametrize("text,channels", [
    ("(@1)", [1]), ("(@1,3)", [1, 3]), ("(@2:5)", [2, 3, 4, 5]), ("(@1,2:4)", [1, 2, 3, 4]),
    ("(@4:2)", [4, 3, 2]), ("(@16)", [16]), ("(@ 1, 3 )", [1, 3]),
])
def test_channel_lists(text, channels):
    # SCPI-1999 vol. 1, 8.3.2 (from memory): (@n), (@n,m), (@n:m) ranges, mixed.
    assert parse_channel_list(text) == channels


@pytest.mark.parametrize("text,code", [("(@17)", -222), ("(@0)", -222), ("(1)", -104),
                                       ("@1", -104), ("(@1:2:3)", -104), ("(@a)", -104)])
def test_bad_channel_lists(text, code):
    with pytest.raises(ScpiError) as info:
        parse_channel_list(text)
    assert info.value.code == code


def test_parse_number_keeps_exact_limits():
    # common practice: the range limits themselves are valid settings
    assert parse_number("2E6", 20, 2e6) == 2e6
    assert parse_number("20", 20, 2e6) == 20


# --- error queue and status -----------------------------------------------------------------

def test_error_queue_is_first_in_first_out_and_answers_no_error_when_empty(toy):
    # SCPI-1999 vol. 2, 21.8: oldest first; 0,"No error" when empty.
    toy.handle("FOO")
    toy.handle("SOUR:VOLT 9")
    assert toy.handle("SYST:ERR?").startswith('-113,"Undefined header')
    assert toy.handle("SYSTEM:ERROR:NEXT?").startswith('-222,"Data out of range')
    assert toy.handle("SYST:ERR?") == '0,"No error"'


def test_queue_overflow_replaces_the_newest_entry():
    # SCPI-1999 vol. 2, 21.8 (from memory): when the queue is full the most recent entry is
    # replaced by -350 Queue overflow and further errors are lost.
    q = ErrorQueue()
    for _ in range(ERROR_QUEUE_SIZE + 5):
        q.push(-113)
    entries = q.entries()
    assert len(entries) == ERROR_QUEUE_SIZE == 16
    assert [c for c, _ in entries[:-1]] == [-113] * 15
    assert entries[-1] == (-350, "Queue overflow")
    for _ in range(16):
        q.pop()
    assert q.pop() == (0, "No error")


def test_esr_bits_by_error_class_and_cleared_by_reading(toy):
    # IEEE 488.2 11.5.1.1: bit 5 (32) command error, bit 4 (16) execution error, bit 3 (8)
    # device-dependent error, bit 2 (4) query error, bit 0 (1) operation complete (*OPC).
    toy.handle("FOO")               # -113: command error
    toy.handle("SOUR:VOLT 9")       # -222: execution error
    toy.errors.push(-350)           # device-dependent
    toy.errors.push(-410)           # query error
    toy.handle("*OPC")
    assert toy.handle("*ESR?") == str(32 + 16 + 8 + 4 + 1)
    assert toy.handle("*ESR?") == "0"  # IEEE 488.2 10.12: reading clears it


def test_cls_clears_queue_and_esr_rst_keeps_the_queue(toy):
    # IEEE 488.2 10.3 (*CLS clears the status data structures) and 10.32 (*RST does not
    # touch the error queue).
    toy.handle("FOO")
    toy.handle("SOUR:VOLT 0.5")
    toy.handle("*RST")
    assert toy.level == 1.0
    assert len(toy.errors) == 1
    toy.handle("*CLS")
    assert len(toy.errors) == 0
    assert toy.handle("*ESR?") == "0"


def test_common_queries(toy):
    # IEEE 488.2 10.14: *IDN? answers four comma-separated fields; 10.38 *TST? 0 = passed;
    # 10.19 *OPC? answers 1.
    maker, model, serial, firmware = toy.handle("*IDN?").split(",")
    assert (maker, model, serial) == ("benchkit-sim", "SIM-TOY", "T-1")
    assert firmware
    assert toy.handle("*TST?") == "0"
    assert toy.handle("*OPC?") == "1"
    assert toy.handle("*WAI") is None
    assert errors(toy) == []


@pytest.mark.parametrize("message", ["SOUR:VOLT\x00 1", "\x01\x02", "SOUR:VOLT 0.5\x7f",
                                     "SOUR:VOLT 0.5\xe9", '*IDN?"', "SOUR:VOLT? ("])
def test_bad_characters_are_syntax_errors(toy, message):
    # IEEE 488.2 7.4 (from memory): program messages are 7-bit ASCII; SCPI-1999 vol. 2,
    # 21.8.9: -102 Syntax error (an unmatched quote or bracket included).
    toy.handle(message)
    codes = [c for c, _ in errors(toy)]
    assert codes and codes[0] in (-102, -104, -224)
    assert toy.level == 1.0


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=200))
def test_any_bytes_never_raise_and_leave_a_bounded_queue(data):
    # common practice: an instrument's parser survives any input; the queue stays <= 16
    toy = _Toy("T-2")
    toy.handle(data.decode("latin-1"))
    assert len(toy.errors) <= ERROR_QUEUE_SIZE
    assert toy.handle("*IDN?").startswith("benchkit-sim,")


@pytest.mark.parametrize("code,text", [(-150, "Command error"), (-250, "Execution error"),
                                       (-399, "Device-specific error"), (-440, "Query error")])
def test_codes_without_own_text_get_their_class_text(code, text):
    # SCPI-1999 vol. 2, 21.8: -100..-199 command, -200..-299 execution, -300..-399
    # device-specific, -400..-499 query errors
    q = ErrorQueue()
    q.push(code)
    assert q.pop() == (code, text)
