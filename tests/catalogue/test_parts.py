"""Parts, fixture and lot files: the demo scenario loads, bad files give one clear line."""

from __future__ import annotations

from pathlib import Path

import pytest

from benchkit.catalogue import (
    DEMO_FIXTURE, DEMO_LOT, DEMO_PARTS, PartsFileError, PartSpec, catalogue_dict,
    load_fixture, load_lot, load_parts,
)
from benchkit.catalogue.codes import tolerance_limits_F
from benchkit.catalogue.conditions import standard_conditions
from benchkit.commands.sim import simulated_parts


def _conditions(spec):
    c = standard_conditions(spec.class_code, spec.nominal_C_F)
    return c.freq_Hz, c.ac_level_Vrms

BAD = Path(__file__).parent / "malformed_parts"
PARTS = load_parts(DEMO_PARTS)


# --- The demo scenario (invented: Brackwater Dynamics) -------------------------------------

def test_demo_parts_cover_the_scenario():
    assert list(PARTS) == [f"BD-{n}" for n in range(1001, 1010)]
    assert {p.class_code for p in PARTS.values()} == {"X5R", "X7R", "C0G"}
    cases = {p.case for p in PARTS.values()}
    assert min(cases) == "0402" and max(cases) == "1210"
    assert min(p.rated_V for p in PARTS.values()) == 6.3
    assert max(p.rated_V for p in PARTS.values()) == 50.0
    assert all(isinstance(p, PartSpec) and p.sim is not None for p in PARTS.values())
    d = catalogue_dict(PARTS["BD-1001"])
    assert set(d) == {"id", "description", "nominal_C_F", "tolerance", "rated_V",
                      "class_code", "case", "supplier"}


def test_demo_fixture_one_sample_per_part_on_channels_1_to_8():
    slots = load_fixture(DEMO_FIXTURE, PARTS)
    assert [s.channel for s in slots] == list(range(1, 9))
    # BD-1009 (mislabelled X7R) sits on the chamber fixture only
    assert sorted(s.part_id for s in slots) == sorted(set(PARTS) - {"BD-1009"})
    assert len({s.sample_id for s in slots}) == 8


def test_demo_temperature_fixture_holds_every_x7r_part():
    slots = load_fixture(DEMO_FIXTURE.parent / "fixture-temperature.toml", PARTS)
    assert sorted(s.part_id for s in slots) == sorted(
        pid for pid, p in PARTS.items() if p.class_code == "X7R")
    assert "BD-1009" in {s.part_id for s in slots}


def test_demo_lot_is_several_samples_of_one_x7r_part():
    lot = load_lot(DEMO_LOT, PARTS)
    assert [s.channel for s in lot] == list(range(1, 7))
    assert [s.sample_id for s in lot] == [f"LOT-2611-0{n}" for n in range(1, 7)]
    assert {s.part_id for s in lot} == {"BD-1004"} and PARTS["BD-1004"].class_code == "X7R"
    # each sample within its tolerance letter (IEC 60062: K = +-10 %)
    lo, hi = PARTS["BD-1004"].tolerance_limits_F()
    for s in lot:
        assert lo <= s.C_scale * PARTS["BD-1004"].nominal_C_F <= hi
    assert len({s.C_scale for s in lot}) == 6 and len({s.field_scale for s in lot}) > 3


def test_fixture_without_parts_skips_the_cross_check():
    slots = load_fixture(BAD / "fixture_unknown_part.toml")
    assert [s.part_id for s in slots] == ["BD-1001", "BD-1099"]


# --- Codes of the trade --------------------------------------------------------------------

# The class-code tables themselves are checked against EIA-198 in tests/catalogue/test_codes.py.

def test_tolerance_letters():
    # standard: IEC 60062: K +-10 %, M +-20 %, Z +80/-20 %, C +-0.25 pF
    assert tolerance_limits_F(10e-6, "K") == pytest.approx((9e-6, 11e-6))
    assert tolerance_limits_F(10e-6, "M") == pytest.approx((8e-6, 12e-6))
    assert tolerance_limits_F(10e-6, "Z") == pytest.approx((8e-6, 18e-6))
    assert tolerance_limits_F(4.7e-12, "C") == pytest.approx((4.45e-12, 4.95e-12))


@pytest.mark.parametrize("pid, expected", [
    ("BD-1001", (1e3, 1.0)),    # class 2 <= 10 uF: 1 kHz, 1.0 Vrms
    ("BD-1005", (120.0, 0.5)),  # class 2 > 10 uF: 120 Hz, 0.5 Vrms
    ("BD-1008", (1e3, 1.0)),    # class 1 > 1000 pF: 1 kHz, 1.0 Vrms
])
def test_standard_measurement_conditions(pid, expected):
    # standard: IEC 60384-1 clause 4.2.2 with IEC 60384-21/-22, as quoted
    assert _conditions(PARTS[pid]) == expected


def test_class1_small_value_is_measured_at_1_MHz():
    # standard: IEC 60384-1 clause 4.2.2 (class 1 <= 1000 pF: 1 MHz), as quoted
    import dataclasses
    small = dataclasses.replace(PARTS["BD-1008"], nominal_C_F=100e-12)
    assert _conditions(small) == (1e6, 1.0)


# --- Bad files: one line naming the file and the field ---------------------------------------

CASES = [
    # (file, loader, expected text after "<file>: ")
    ("negative_rated_V.toml", "parts",
     "part 3 (BD-9003): field 'rated_V': must be a positive number, got -5"),
    ("unknown_field.toml", "parts",
     "part 1 (BD-9001): unknown field 'ratedV'; did you mean 'rated_V'?"),
    ("wrong_type.toml", "parts",
     "part 1 (BD-9001): field 'nominal_C_F': must be a positive number, got '10u'"),
    ("bool_as_number.toml", "parts",
     "part 1 (BD-9001): field 'rated_V': must be a positive number, got true"),
    ("bad_class_code.toml", "parts", "part 1 (BD-9001): field 'class_code': must be an "
     "EIA-198 code"),
    ("bad_tolerance.toml", "parts", "part 1 (BD-9001): field 'tolerance': must be an "
     "IEC 60062 letter"),
    ("bad_case.toml", "parts", "part 1 (BD-9001): field 'case': must be an EIA inch case code"),
    ("duplicate_id.toml", "parts", "part 2 (BD-9001): field 'id': duplicate part id"),
    ("missing_field.toml", "parts", "part 1 (BD-9001): missing field 'rated_V'"),
    ("no_company.toml", "parts", "missing field 'company'"),
    ("sim_unknown_field.toml", "sim",
     "part 1 (BD-9001): unknown field 'sim.tau_relax'; did you mean 'sim.tau_relax_s'?"),
    ("sim_zero_thickness.toml", "sim", "part 1 (BD-9001): field 'sim.layer_thickness_m': "
     "must be a positive number, got 0.0"),
    ("sim_class1_field_on_class2.toml", "sim", "part 1 (BD-9001): field "
     "'sim.tempco_ppm_per_K': not for a class-2 code"),
    ("syntax_error.toml", "parts", "TOML syntax error: "),
    ("fixture_unknown_part.toml", "fixture",
     "channel entry 2 (FX-02): field 'part_id': unknown part"),
    ("fixture_duplicate_channel.toml", "fixture",
     "channel entry 2 (FX-02): field 'channel': channel already used by FX-01, got 1"),
    ("fixture_channel_out_of_range.toml", "fixture",
     "channel entry 1 (FX-01): field 'channel': must be an integer from 1 to 16, got 17"),
    ("lot_negative_scale.toml", "lot",
     "sample 2 (LOT-0001-02): field 'C_scale': must be a positive number, got -0.98"),
    ("lot_unknown_part.toml", "lot", "field 'part_id': unknown part"),
]


@pytest.mark.parametrize("name, loader, expected", CASES, ids=[c[0] for c in CASES])
def test_malformed_file_gives_one_line_naming_file_and_field(name, loader, expected):
    path = BAD / name
    load = {"parts": load_parts,
            "sim": lambda p: simulated_parts(load_parts(p)),
            "fixture": lambda p: load_fixture(p, PARTS),
            "lot": lambda p: load_lot(p, PARTS)}[loader]
    with pytest.raises(PartsFileError) as info:
        load(path)
    msg = str(info.value)
    assert isinstance(info.value, ValueError)
    assert "\n" not in msg
    assert msg.startswith(f"{path}: ")
    assert msg[len(f"{path}: "):].startswith(expected), msg
    assert info.value.__cause__ is None or info.value.__suppress_context__


def test_syntax_error_names_the_line():
    with pytest.raises(PartsFileError, match=r"at line 6\b"):
        load_parts(BAD / "syntax_error.toml")


def test_missing_file_is_one_line():
    with pytest.raises(PartsFileError, match=r"nowhere\.toml: file not found"):
        load_parts(BAD / "nowhere.toml")


def test_every_malformed_file_is_covered():
    # no file in malformed_parts/ without its expected message (keeps the set honest)
    assert sorted(p.name for p in BAD.glob("*.toml")) == sorted(c[0] for c in CASES)


def test_physics_outside_the_labelled_band_is_simulated_as_given():
    # a mislabelled part (physics leaving its EIA-198 band) is what the class-code check is
    # for: the simulator takes the physics as it is, and it stays outside the band
    parts = load_parts(Path(__file__).parent / "mislabelled_part.toml")
    sim = simulated_parts(parts)["BD-9001"]
    pts = dict(zip(sim.sim.tempco_points_C, sim.sim.tempco_points_pct))
    assert pts[-55.0] == -20.0 and parts["BD-9001"].class_code == "X7R"
