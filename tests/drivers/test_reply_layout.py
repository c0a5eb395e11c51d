"""Profiles that declare the reply layout, set formats, setup/shutdown lists, capabilities,
list sweeps and the VISA library: exact command/reply conversations, no hardware.

Sources: SCPI-1999 vol. 1, 7.2 (decimal numeric data, with or without an exponent; 9.9E37 as
overrange, from memory); the SI brochure (9th ed.) for unit prefixes p n u m k M; IEEE 488.2
for *IDN?/*CLS; the pyvisa docs for ResourceManager('<library>') (e.g. '@py', '@sim').
"""

from __future__ import annotations

import math

import pytest

from instruments.drivers import InstrumentLinkError, LCRMeter, ProfileError, load_profile
from instruments.drivers.fake import FakeResourceManager, open_sequence
from instruments.drivers.lcr_meter import UnitMismatch
from instruments.drivers.session import Session

RES = "GPIB0::17::INSTR"
OK = '0,"No error"'
ERR = "SYSTem:ERRor?"
BASE = load_profile("generic-lcr").source


def profile(tmp_path, body: str, name: str = "own-lcr"):
    p = tmp_path / f"{name}.toml"
    p.write_text(f'[profile]\nbase = "{BASE}"\nname = "{name}"\n' + body, encoding="utf-8")
    return p


def meter(prof, protocol):
    rm = FakeResourceManager(open_sequence() + protocol)
    return LCRMeter(RES, profile=prof, rm=rm, backoff_s=0), rm


STATUS = '[measure.reply]\nfields = ["primary", "secondary", "status"]\nstatus_ok = ["0"]\n' \
         'status_overload = ["1"]\n'
SWAPPED = '[measure.reply]\nfields = ["secondary", "primary"]\n'


def test_a_status_field_is_read_and_a_good_status_gives_the_values(tmp_path):
    m, rm = meter(profile(tmp_path, STATUS), [
        ("FUNCtion?", "CPD"), ("INITiate", None), ("FETCh?", "2.2E-06,1.2E-02,0")])
    with m:
        r = m.measure()
    assert (r.C_F, r.D, r.status, r.valid) == (2.2e-6, 0.012, "0", True)
    rm.assert_done()


@pytest.mark.parametrize("reply, overload, status_ok", [
    ("9.9E37,9.9E37,1", True, True),     # listed as overload
    ("2.2E-06,1.2E-02,1", True, True),   # the status says overload even if numbers look fine
    ("2.2E-06,1.2E-02,4", False, False), # a status the profile does not know: not believed
])
def test_a_bad_status_is_never_a_number(tmp_path, reply, overload, status_ok):
    m, rm = meter(profile(tmp_path, STATUS), [
        ("FUNCtion?", "CPD"), ("INITiate", None), ("FETCh?", reply)])
    with m:
        r = m.measure()
    assert math.isnan(r.primary) and math.isnan(r.secondary) and not r.valid
    assert (r.overload, r.status_ok) == (overload, status_ok)
    rm.assert_done()


def test_the_declared_field_order_is_followed(tmp_path):
    m, rm = meter(profile(tmp_path, SWAPPED), [
        ("FUNCtion?", "CSD"), ("INITiate", None), ("FETCh?", "1.5E-02,1.0E-05")])
    with m:
        r = m.measure()
    assert (r.C_F, r.D) == (1.0e-5, 0.015)
    rm.assert_done()


def test_ignored_fields_and_other_separators(tmp_path):
    body = ('[measure.reply]\nfields = ["ignore", "primary", "ignore", "secondary"]\n'
            'separator = ";"\n')
    m, rm = meter(profile(tmp_path, body), [
        ("FUNCtion?", "CPD"), ("INITiate", None), ("FETCh?", "7;4.7E-07;x;3.0E-03")])
    with m:
        r = m.measure()
    assert (r.C_F, r.D) == (4.7e-7, 3e-3)
    rm.assert_done()


@pytest.mark.parametrize("reply, C, second", [
    ("2.2uF,0.012", 2.2e-6, 0.012),          # SI prefix u = 1e-6
    ("2.2E-06 F,0.012", 2.2e-6, 0.012),
    ("470nF,0.003", 470e-9, 0.003),
    ("1.0pF,0.0", 1.0e-12, 0.0),
])
def test_unit_suffixes_with_si_prefixes(tmp_path, reply, C, second):
    m, rm = meter(profile(tmp_path, '[measure.reply]\nunits = "suffix"\n'), [
        ("FUNCtion?", "CPD"), ("INITiate", None), ("FETCh?", reply)])
    with m:
        r = m.measure()
    assert r.C_F == pytest.approx(C, rel=1e-12) and r.secondary == second
    rm.assert_done()


def test_rs_carries_ohm_and_a_wrong_unit_names_the_likely_cause(tmp_path):
    prof = profile(tmp_path, '[measure.reply]\nunits = "suffix"\n')
    m, rm = meter(prof, [("FUNCtion CSRS", None), (ERR, OK), ("INITiate", None),
                         ("FETCh?", "1.0uF,25mOHM"), ("INITiate", None),
                         ("FETCh?", "4.7uH,0.01")])
    with m:
        m.function = "CSRS"
        assert m.measure().Rs_ohm == pytest.approx(0.025)
        with pytest.raises(UnitMismatch) as exc:
            m.measure()                       # an inductance: another function than set
    msg = str(exc.value)
    assert "'uH'" in msg and "function" in msg and "order" in msg
    rm.assert_done()


def test_a_reply_of_another_layout_is_unreadable_and_says_which_layout(tmp_path):
    m, rm = meter(profile(tmp_path, ""), [
        ("FUNCtion?", "CPD"),
        *[x for _ in range(3) for x in (("INITiate", None), ("FETCh?", "2.2E-06,1.2E-02,0"),
                                        ("*CLS", None), ("*OPC?", "1"))][:-2],
    ])
    with m:
        with pytest.raises(Exception) as exc:
            m.measure()
    assert "<primary>,<secondary>" in str(exc.value) and "[measure.reply]" in str(exc.value)


def test_documented_float_format_is_applied(tmp_path):
    # PROFILES.md: "{value:.6E} picks a float format"; Python format mini-language: .6E
    body = ('[setting.freq_Hz]\nset = "SOURce:FREQuency {value:.6E}"\n'
            '[setting.ac_level_Vrms]\nset = "SOURce:VOLTage {value:.3f}"\n')
    m, rm = meter(profile(tmp_path, body), [
        ("SOURce:FREQuency 1.000000E+03", None), (ERR, OK),
        ("SOURce:VOLTage 0.500", None), (ERR, OK)])
    with m:
        m.freq_Hz = 1000
        m.ac_level_Vrms = 0.5
    rm.assert_done()


def test_setup_is_sent_after_opening_and_shutdown_before_closing(tmp_path):
    body = '[sequence]\nsetup = ["*RST", "DISPlay:ENABle OFF"]\nshutdown = ["DISPlay:ENABle ON"]\n'
    prof = profile(tmp_path, body)
    rm = FakeResourceManager(open_sequence()[:3] + [("*RST", None), ("DISPlay:ENABle OFF", None),
                                                    (ERR, OK), ("DISPlay:ENABle ON", None),
                                                    ("*OPC?", "1")])
    with LCRMeter(RES, profile=prof, rm=rm, backoff_s=0):
        pass
    rm.assert_done()


def test_capabilities_present_usable_or_absent(tmp_path):
    generic = load_profile("generic-lcr")
    assert generic.has("level_monitor") and generic.may_use("level_monitor")
    assert not generic.has("internal_bias") and not generic.has("level_control")
    # a meter without an AC-level monitor can be profiled: drop the setting from a copy
    text = open(load_profile("generic-lcr").source, encoding="utf-8").read()
    body = text[:text.index("[setting.ac_dut_Vrms]")]    # the last table of the file
    p = tmp_path / "no-monitor.toml"
    p.write_text(body.replace('name = "generic-lcr"', 'name = "no-monitor"'), encoding="utf-8")
    prof = load_profile(p)
    assert "ac_dut_Vrms" not in prof.settings and not prof.has("level_monitor")
    m, rm = meter(prof, [])
    with m:
        with pytest.raises(ProfileError, match="level_monitor"):
            m.ac_dut_Vrms
    rm.assert_done()
    # present but withheld from the engine
    q = profile(tmp_path, "[capabilities]\nengine_may_use = []\n", "withheld")
    w = load_profile(q)
    assert w.has("level_monitor") and not w.may_use("level_monitor")


@pytest.mark.parametrize("body, expect", [
    ('[capabilities]\nengine_may_use = ["internal_bias"]\n', "does not spell"),
    ('[capabilities]\nengine_may_use = ["teleport"]\n', "unknown capability"),
    ('[setting.bias_V]\ntype = "float"\nquery = "BIAS?"\nset = "BIAS {value}"\nmin = 0\nmax = 1\n',
     "needs [setting.bias_on]"),
    ('[measure.reply]\nfields = ["primary", "status"]\n', "'primary' and 'secondary'"),
    ('[measure.reply]\nfields = ["primary", "secondary", "status"]\n', "needs status_ok"),
    ('[measure.reply]\nfields = ["primary", "secondary", "colour"]\n', "'colour' unknown"),
    ('[measure.reply]\nseparator = "|"\n', "separator"),
    ('[sequence]\nsetup = ["*IDN?"]\n', "commands only"),
    ('[sequence]\nsetup = ["OUTPut ON; *RST"]\n', "parameter text"),
    ('[list]\ntrigger = "LIST:RUN"\nfetch = "LIST:DATA?"\n', "'freq' or 'bias'"),
])
def test_bad_new_tables_are_refused_with_the_field_named(tmp_path, body, expect):
    with pytest.raises(ProfileError, match=None) as exc:
        load_profile(profile(tmp_path, body))
    assert expect in str(exc.value)


LIST = ('[list]\nfreq = "LIST:FREQuency {values}"\ntrigger = "LIST:RUN"\nfetch = "LIST:DATA?"\n'
        'max_points = 4\n')


def test_a_list_sweep_over_frequency(tmp_path):
    prof = load_profile(profile(tmp_path, LIST + STATUS))
    assert prof.has("list_sweep")
    m, rm = meter(prof, [
        ("LIST:FREQuency 100,1000,10000", None), (ERR, OK), ("FUNCtion?", "CPD"),
        ("LIST:RUN", None),
        ("LIST:DATA?", "1.0E-05,1.0E-02,0,9.9E-06,1.1E-02,0,9.9E37,9.9E37,1")])
    with m:
        rows = m.measure_list("freq", [100, 1e3, 1e4])
        with pytest.raises(ValueError):
            m.measure_list("freq", [1e3] * 5)         # more than max_points: nothing sent
        with pytest.raises(ValueError):
            m.measure_list("freq", [2e7])             # outside freq_Hz's range (to 10 MHz)
        with pytest.raises(ValueError):
            m.measure_list("bias", [1.0])             # no list over bias in this profile
    assert [r.C_F for r in rows[:2]] == [1.0e-5, 9.9e-6] and rows[2].overload
    rm.assert_done()


def test_the_visa_library_is_the_callers_choice(monkeypatch):
    import pyvisa

    asked = []

    class Refused(Exception):
        pass

    def fake_rm(lib):
        asked.append(lib)
        raise Refused("library not found")

    monkeypatch.setattr(pyvisa, "ResourceManager", fake_rm)
    for lib, want in ((None, "@py"), ("@ivi", "@ivi"), ("/opt/visa/libvisa.so", "/opt/visa/libvisa.so")):
        s = Session(RES, role="meter", visa_library=lib)
        with pytest.raises(InstrumentLinkError) as exc:
            s.open()
        assert asked[-1] == want and repr(want) in str(exc.value)
        assert "visa_library" in str(exc.value)


def test_reconnect_reapplies_the_bias_voltage_but_never_switches_the_bias_on():
    # as the supply driver: "the driver does not switch the output on by itself"
    from instruments.sim.bench import ALT_METER_PROFILE

    prof = load_profile(ALT_METER_PROFILE)
    opening = [("@open", None), ("*IDN?", "Brackwater Dynamics,m,1,1"), ("*CLS", None)]
    rm = FakeResourceManager(opening + [
        ("BIAS:STATe OFF", None), ("BIAS:VOLTage 0", None), (ERR, OK),
        ("BIAS:VOLTage 2.000000E+00", None), (ERR, OK),
        ("BIAS:STATe ON", None), (ERR, OK),
        *opening,                                  # reopened: *IDN?, *CLS
        ("BIAS:VOLTage 2.000000E+00", None), (ERR, OK),
        ("BIAS:VOLTage 0", None), ("BIAS:STATe OFF", None), ("*OPC?", "1")])
    with LCRMeter(RES, profile=prof, rm=rm, backoff_s=0) as m:
        m.bias_V = 2.0
        m.bias_on = True
        m.reconnect()
    rm.assert_done()
