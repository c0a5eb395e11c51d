"""Meta-tests: every shipped profile keeps the conventions, and speaks COMMANDS.md exactly."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from instruments.drivers import (DRIVERS, PROFILE_DIR, ProfileError, check_profile_matches,
                                 load_profile, shipped_profiles)
from instruments.drivers.profile import CommandTemplate
from instruments.drivers.setting import UNITS, Setting

COMMANDS_MD = Path(__file__).resolve().parents[2] / "instruments" / "COMMANDS.md"


def _mnemonic_regex(word: str) -> str:
    # SCPI-1999 vol. 1, 6.2.1: a mnemonic is accepted in its short form (the upper-case
    # letters) or its long form, in any case.
    short = re.match(r"^[A-Z0-9]*", word).group(0)
    return f"(?:{re.escape(short)}|{re.escape(word.upper())})" if short != word.upper() \
        else re.escape(word.upper())


def _header_regex(spec: str) -> str:
    """'[SENSe:]FUNCtion' -> a regex for every accepted spelling ('[...]' = optional node)."""
    out, i = [], 0
    while i < len(spec):
        c = spec[i]
        if c == "[":
            out.append("(?:")
        elif c == "]":
            out.append(")?")
        elif c in ":*?":
            out.append(re.escape(c))
        elif c.isalnum():
            j = i
            while j < len(spec) and spec[j].isalnum():
                j += 1
            out.append(_mnemonic_regex(spec[i:j]))
            i = j
            continue
        else:
            raise AssertionError(f"unexpected {c!r} in {spec!r}")
        i += 1
    return "".join(out)


def documented_headers() -> dict[str, list[tuple[str, bool]]]:
    """Per section of COMMANDS.md: (header regex, takes a parameter) of every command."""
    sections: dict[str, list[tuple[str, bool]]] = {}
    current = None
    for line in COMMANDS_MD.read_text().splitlines():
        if line.startswith("## "):
            current = re.sub(r"\s*\(role `\w+`\)", "", line[3:]).strip()
            sections[current] = []
            continue
        if not line.startswith("|") or current is None:
            continue
        first = line.split("|")[1]
        spans = re.findall(r"`([^`]+)`", first)
        if not spans:
            continue
        main = spans[0]
        header, _, arg = main.partition(" ")
        sections[current].append((_header_regex(header), bool(arg)))
        if len(spans) > 1 and spans[1] == "?":        # "`X <v>` / `?`": the query form
            sections[current].append((_header_regex(header + "?"), False))
    return sections


SECTION_OF_KIND = {"lcr-meter": "LCR meter", "dc-supply": "DC bias supply",
                   "scanner": "Channel scanner", "thermometer": "Thermometer",
                   "chamber": "Temperature chamber"}
COMMON = "Common to every instrument (IEEE 488.2)"


def all_templates(p) -> list[tuple[str, CommandTemplate]]:
    out = [(f"common.{k}", t) for k, t in p.common.items()]
    out += [(f"commands.{k}", t) for k, t in p.commands.items()]
    for name, s in p.settings.items():
        out.append((f"setting.{name}.query", s.query))
        if s.set is not None:
            out.append((f"setting.{name}.set", s.set))
    return out


def test_the_four_generic_profiles_are_shipped():
    assert set(shipped_profiles()) >= {"generic-lcr", "generic-dc-supply", "generic-scanner",
                                       "generic-thermometer"}


def test_commands_md_parses_into_headers():
    # guard for the meta-test below: the parser found the tables of COMMANDS.md
    docs = documented_headers()
    assert set(SECTION_OF_KIND.values()) | {COMMON} <= set(docs)
    assert all(docs[s] for s in docs if s in set(SECTION_OF_KIND.values()) | {COMMON})
    rx = [r for r, _ in docs["LCR meter"]]
    assert any(re.fullmatch(r, "SENS:FUNC", re.I) for r in rx)
    assert any(re.fullmatch(r, "function", re.I) for r in rx)
    assert not any(re.fullmatch(r, "FUNCT", re.I) for r in rx)   # neither short nor long
    assert not any(re.fullmatch(r, "SOUR:FREK", re.I) for r in rx)
    assert any(re.fullmatch(r, "SOURce:FREQuency:CW", re.I) for r in rx)
    sup = [r for r, _ in docs["DC bias supply"]]
    assert any(re.fullmatch(r, "SOUR:VOLT:LEV:IMM:AMPL", re.I) for r in sup)
    assert not any(re.fullmatch(r, "OUTP:STAT:ON", re.I) for r in sup)


@pytest.mark.parametrize("name", shipped_profiles())
def test_profile_conventions(name):
    p = load_profile(name)
    driver = DRIVERS[p.kind]
    check_profile_matches(driver, p)
    # generic profiles say what they are and claim no commercial model
    assert p.description.startswith("Generic SCPI")
    text = (PROFILE_DIR / f"{name}.toml").read_text()
    assert "no specific commercial model" in text
    declared = driver.declared_settings()
    for sname, spec in p.settings.items():
        s = declared[sname]
        assert isinstance(s, Setting) and s.__doc__
        # every setting: a query, and a set command unless it is read-only
        assert spec.query.is_query
        assert (spec.set is None) == spec.read_only
        # a unit suffix in the name (float), or a bool named *_on, or an enum
        if spec.type == "float":
            assert s.unit in UNITS and sname.endswith("_" + s.unit)
        elif spec.type == "bool":
            assert sname.endswith("_on")
        # a validator: a strict range for settable floats, a discrete set for enums
        if spec.type == "float" and not spec.read_only:
            assert spec.min < spec.max
        if spec.type == "enum":
            assert spec.values and set(spec.values) <= set(s.values)
        if spec.type == "bool":
            assert spec.true_token.upper() != spec.false_token.upper()
    # a declared setting missing from the profile would have failed check_profile_matches,
    # unless it belongs to an optional capability
    required = {n for n, s in declared.items() if not s.optional}
    assert required <= set(p.settings) <= set(declared)
    for n in set(declared) - set(p.settings):
        assert not p.has(declared[n].optional)


@pytest.mark.parametrize("name", shipped_profiles())
def test_profile_commands_are_the_documented_ones(name):
    p = load_profile(name)
    if not name.startswith("generic-"):
        pytest.skip("only the generic profiles must match COMMANDS.md")
    docs = documented_headers()
    allowed = docs[SECTION_OF_KIND[p.kind]] + docs[COMMON]
    for where, t in all_templates(p):
        header = t.header.lstrip(":")
        hits = [(rx, arg) for rx, arg in allowed if re.fullmatch(rx, header, re.I)]
        assert hits, f"{name} {where}: {t.text!r} is not in COMMANDS.md"
        has_param = " " in t.text
        # SCPI: a set command carries its parameter; route queries carry a channel list
        assert any(arg == has_param or (t.is_query and has_param) for _, arg in hits), where


def test_channel_range_and_limits_match_commands_md():
    # the numbers in COMMANDS.md tables
    lcr = load_profile("generic-lcr").settings
    assert (lcr["freq_Hz"].min, lcr["freq_Hz"].max) == (20.0, 10e6)
    assert (lcr["ac_level_Vrms"].min, lcr["ac_level_Vrms"].max) == (0.005, 2.0)
    assert set(lcr["function"].values) == {"CPD", "CSRS", "CSD", "ZTD"}
    sup = load_profile("generic-dc-supply").settings
    assert (sup["voltage_V"].min, sup["voltage_V"].max) == (-60.0, 60.0)
    assert (sup["current_limit_A"].min, sup["current_limit_A"].max) == (0.0001, 1.0)
    sc = load_profile("generic-scanner").options
    assert (sc["first_channel"], sc["last_channel"]) == (1, 16)


# -- profile loading errors: one clear line naming the file and the field ------------------

def _write(tmp_path: Path, text: str, name: str = "mine.toml") -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def test_own_profile_based_on_generic_overrides_a_range(tmp_path):
    p = _write(tmp_path, f"""
[profile]
base = "{PROFILE_DIR / 'generic-dc-supply.toml'}"
name = "bench-3-supply"
description = "our 20 V supply"
[setting.voltage_V]
min = -20.0
max = 20.0
""")
    prof = load_profile(p)
    assert prof.name == "bench-3-supply" and prof.kind == "dc-supply"
    assert (prof.settings["voltage_V"].min, prof.settings["voltage_V"].max) == (-20.0, 20.0)
    assert prof.settings["voltage_V"].set.text == "VOLTage {value}"   # inherited


@pytest.mark.parametrize("body, expect", [
    ('[profile]\nname="x"\nkind="lcr-meter"\ndescription="d"\n', "missing table [measure]"),
    ('[profile]\nname="x"\nkind="oven"\ndescription="d"\n', "kind 'oven' unknown"),
    ('[profile]\nname="x"\nkind="thermometer"\ndescription="d"\ncolour="red"\n', "colour"),
    ('[profile]\nname="x"\nkind="thermometer"\ndescription="d"\n[setting.temperature_C]\n'
     'type="float"\nquery="MEAS:TEMP?;*RST"\nread_only=true\n', "setting.temperature_C"),
    ('[profile]\nname="x"\nkind="dc-supply"\ndescription="d"\n[setting.voltage_V]\n'
     'type="float"\nquery="VOLT?"\nset="VOLT {value}"\n', "needs 'min' and 'max'"),
    ('[profile]\nname="x"\nkind="dc-supply"\ndescription="d"\n[setting.voltage_V]\n'
     'type="float"\nquery="VOLT?"\nset="VOLT {value} {other}"\nmin=0\nmax=1\n', "{other}"),
    ('[profile]\nname="x"\nkind="dc-supply"\ndescription="d"\n[setting.voltage_V]\n'
     'type="float"\nquery="VOLT?"\nset="VOLT 1"\nmin=0\nmax=1\n', "exactly one {value}"),
    ('[profile]\nname="x"\nkind="dc-supply"\ndescription="d"\n[setting.voltage_V]\n'
     'type="float"\nquery="VOLT?"\nset="VOLT {value}"\nmin=2\nmax=1\n', "must be below"),
    ('[profile]\nname="x"\nkind="dc-supply"\ndescription="d"\n[setting.output_on]\n'
     'type="bool"\nquery="OUTP?"\nset="OUTP {value}"\ntrue="ON;*RST"\n', "token"),
    ('[profile]\nname="x"\nkind="scanner"\ndescription="d"\n[route]\nfirst_channel=2\n'
     'last_channel=1\nopen_all="ROUT:OPEN:ALL"\nclose="ROUT:CLOS (@{channel})"\n'
     'open="ROUT:OPEN (@{channel})"\nis_closed="ROUT:CLOS? (@{channel})"\n', "must not exceed"),
    ('[profile\n', "not valid TOML"),
])
def test_bad_profiles_are_refused_with_the_field_named(tmp_path, body, expect):
    p = _write(tmp_path, body)
    with pytest.raises(ProfileError) as exc:
        load_profile(p)
    assert expect in str(exc.value) and str(p) in str(exc.value)


def test_missing_profile_lists_the_shipped_ones():
    with pytest.raises(ProfileError, match="generic-lcr"):
        load_profile("no-such-profile")


def test_profile_base_loop_is_refused(tmp_path):
    _write(tmp_path, '[profile]\nbase="b.toml"\n', "a.toml")
    _write(tmp_path, '[profile]\nbase="a.toml"\n', "b.toml")
    with pytest.raises(ProfileError, match="loop"):
        load_profile(tmp_path / "a.toml")


def test_profile_for_another_kind_is_refused_by_the_driver():
    from instruments.drivers import LCRMeter
    with pytest.raises(ProfileError, match="dc-supply"):
        LCRMeter("TCPIP0::127.0.0.1::5025::SOCKET", profile="generic-dc-supply")


def test_profile_missing_a_setting_is_refused_by_the_driver(tmp_path):
    from instruments.drivers import Thermometer
    p = _write(tmp_path, '[profile]\nname="x"\nkind="thermometer"\ndescription="d"\n')
    with pytest.raises(ProfileError, match=r"missing \[setting.temperature_C\]"):
        Thermometer("TCPIP0::127.0.0.1::5025::SOCKET", profile=p)


def test_setting_declaration_enforces_unit_suffix():
    # the unit-suffix convention is checked when a driver class is defined
    with pytest.raises((ValueError, RuntimeError)):
        class Bad:  # noqa: F841
            freq = Setting("no unit in the name", type="float", unit="Hz")


def test_the_example_in_profiles_md_works(tmp_path, monkeypatch):
    # PROFILES.md is the user's guide: its example profile and test must run as written
    doc = (PROFILE_DIR.parent / "PROFILES.md").read_text()
    blocks = re.findall(r"```(toml|python)\n(.*?)```", doc, re.S)
    toml_text = next(b for k, b in blocks if k == "toml")
    py_text = next(b for k, b in blocks if k == "python")
    (tmp_path / "bench-3-supply.toml").write_text(toml_text)
    prof = load_profile("bench-3-supply.toml", relative_to=tmp_path)
    assert (prof.settings["voltage_V"].min, prof.settings["voltage_V"].max) == (-20.0, 20.0)
    monkeypatch.chdir(tmp_path)
    exec(compile(py_text, "PROFILES.md", "exec"), {})
