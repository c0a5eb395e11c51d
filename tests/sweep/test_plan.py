"""Plan validation: every problem is one line naming the file and field, before any output."""

from pathlib import Path

import pytest

from benchkit.errors import UserError
from benchkit.sweep.plan import SampleRef, build_sweeps, discharge_wait_s, load_plan, parse_plan, resolve_samples
from benchkit.catalogue import load_catalogue

from sweep_helpers import REPO, write_plan

PARTS = load_catalogue()  # demo catalogue: BD-1001 is 10 uF 6.3 V X5R, BD-1008 10 nF 50 V C0G


def _load(tmp_path, **kw):
    return load_plan(write_plan(tmp_path / "p.toml", **kw), PARTS)


def test_demo_plan_is_valid_for_the_demo_fixture():
    from benchkit.catalogue import DEMO_FIXTURE, load_fixture

    plan = load_plan(REPO / "data" / "plans" / "demo.toml", PARTS)
    chans = [SampleRef(s.sample_id, s.part_id, s.channel) for s in load_fixture(DEMO_FIXTURE)]
    sweeps = build_sweeps(plan, resolve_samples(plan, chans), PARTS, (-60.0, 60.0))
    assert [sw.sample.sample_id for sw in sweeps] == [c.sample_id for c in chans]
    for sw in sweeps:  # tops at each part's rated voltage, never above
        assert max(p.bias_V for p in sw.points) == pytest.approx(sw.part.rated_V)


def test_linear_rising_then_falling_sequence(tmp_path):
    plan = _load(tmp_path, bias={"start_V": 0.0, "stop_V": 1.5, "step_V": 0.5})
    seq = plan.sequence(rated_V=6.3)
    # 0.1 + 0.2 style float dust must not show up in set points (0.5 steps are exact anyway)
    assert seq == [("rising", 0.0), ("rising", 0.5), ("rising", 1.0), ("rising", 1.5),
                   ("falling", 1.0), ("falling", 0.5), ("falling", 0.0)]
    plan = _load(tmp_path, bias={"start_V": 0.0, "stop_V": 0.3, "step_V": 0.1})
    assert [v for _, v in plan.sequence(6.3)] == [0.0, 0.1, 0.2, 0.3, 0.2, 0.1, 0.0]


def test_negative_and_both_polarities(tmp_path):
    plan = _load(tmp_path, bias={"polarity": "negative"})
    assert [v for _, v in plan.sequence(6.3)] == [0.0, -2.0, -4.0, -2.0, 0.0]
    plan = _load(tmp_path, bias={"polarity": "both"})
    seq = plan.sequence(6.3)
    assert [v for _, v in seq] == [0.0, 2.0, 4.0, 2.0, 0.0, -2.0, -4.0, -2.0, 0.0]
    assert [b for b, _ in seq] == ["rising"] * 3 + ["falling"] * 2 + ["rising"] * 2 + ["falling"] * 2


def test_repeats_and_keys(tmp_path):
    plan = _load(tmp_path, bias={"repeats": 2}, samples=[{"sample_id": "A", "part_id": "BD-1001", "channel": 1}])
    (sw,) = build_sweeps(plan, plan.samples, PARTS)
    assert len(sw.points) == 2 * 5
    assert len({p.key for p in sw.points}) == len(sw.points)  # (sample, repeat, step) is unique


def test_fraction_of_rated_scales_per_part(tmp_path):
    plan = _load(tmp_path, bias={"start_V": None, "stop_V": None, "step_V": None,
                                 "fraction_of_rated": 0.5, "steps": 2, "branches": ["rising"]})
    assert [v for _, v in plan.sequence(50.0)] == [0.0, 12.5, 25.0]


def test_explicit_points(tmp_path):
    plan = _load(tmp_path, bias={"start_V": None, "stop_V": None, "step_V": None, "points_V": [0, 1, 3]})
    assert [v for _, v in plan.sequence(6.3)] == [0.0, 1.0, 3.0, 1.0, 0.0]


def test_standard_conditions_unless_the_plan_says(tmp_path):
    plan = _load(tmp_path)
    sw = build_sweeps(plan, [SampleRef("A", "BD-1005", 5), SampleRef("B", "BD-1008", 8)], PARTS)
    # [standard: IEC 60384-1 clause 4.2.2 / IEC 60384-22]: 22 uF class 2 -> 120 Hz, 0.5 Vrms
    assert (sw[0].conditions.freq_Hz, sw[0].conditions.ac_level_Vrms) == (120.0, 0.5)
    # [standard: IEC 60384-1 clause 4.2.2 / IEC 60384-21]: 10 nF class 1 (> 1000 pF) -> 1 kHz, 1.0 Vrms
    assert (sw[1].conditions.freq_Hz, sw[1].conditions.ac_level_Vrms) == (1e3, 1.0)
    assert "IEC 60384-21" in sw[1].conditions.source
    plan = _load(tmp_path, measure={"freq_Hz": 10e3, "ac_level_Vrms": 0.5, "function": "csrs"})
    c = build_sweeps(plan, [SampleRef("A", "BD-1005", 5)], PARTS)[0].conditions
    assert (c.function, c.freq_Hz, c.ac_level_Vrms) == ("CSRS", 10e3, 0.5)
    assert c.source.startswith("plan ")


def test_discharge_wait_from_rc(tmp_path):
    plan = _load(tmp_path, limits={"discharge_wait_s": None, "discharge_R_ohm": 1e5, "safe_V": 1.0})
    sweeps = build_sweeps(plan, [SampleRef("A", "BD-1001", 1)], PARTS)
    wait, how = discharge_wait_s(plan, sweeps)
    # [common practice]: t = R*C*ln(V0/V_safe) = 1e5 * 10e-6 * ln(4/1) = 1.386294 s [derived]
    assert wait == pytest.approx(1.386294, rel=1e-6)
    assert "ln(V0/V_safe)" in how


def test_plan_hash_is_stable_and_sensitive(tmp_path):
    a = _load(tmp_path)
    b = parse_plan(a.to_dict(), "run.json plan")  # what resume does with the stored plan
    assert a.sha256 == b.sha256
    c = _load(tmp_path, measure={"dwell_s": 1.5})
    assert c.sha256 != a.sha256


@pytest.mark.parametrize(
    "kw, field",
    [
        ({"bias": {"step_V": -1.0}}, "bias.step_V"),
        ({"bias": {"step_V": 1.5}}, "bias.step_V"),  # 4 V is not a whole number of 1.5 V steps
        ({"bias": {"branches": ["falling"]}}, "bias.branches"),
        ({"bias": {"polarity": "sideways"}}, "bias.polarity"),
        ({"bias": {"points_V": [0, 1]}}, "bias"),  # two kinds of bias points at once
        ({"measure": {"dwell_s": None}}, "measure.dwell_s"),
        ({"measure": {"n_readings": 0}}, "measure.n_readings"),
        ({"measure": {"n_readings": 2.5}}, "measure.n_readings"),
        ({"measure": {"dwel_s": 3.0}}, "measure.dwel_s"),  # a typo is refused, not ignored
        ({"measure": {"function": "ZTD"}}, "measure.function"),
        ({"measure": {"freq_Hz": 15e6}}, "measure.freq_Hz"),
        ({"limits": {"current_limit_A": 0}}, "limits.current_limit_A"),
        ({"limits": {"max_ramp_V_per_s": None}}, "limits.max_ramp_V_per_s"),
        ({"limits": {"allow_above_rated": "yes"}}, "limits.allow_above_rated"),
        ({"limits": {"discharge_wait_s": None}}, "limits.discharge_wait_s"),
        ({"samples": [{"sample_id": "A", "part_id": "BD-1001", "channel": 0}]}, "samples[1].channel"),
    ],
)
def test_bad_field_is_one_line_naming_file_and_field(tmp_path, kw, field):
    with pytest.raises(UserError) as e:
        _load(tmp_path, **kw)
    msg = str(e.value)
    assert "\n" not in msg
    assert str(tmp_path / "p.toml") in msg and f"'{field}'" in msg


def test_malformed_toml_names_the_line(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[bias]\nstart_V = = 3\n")
    with pytest.raises(UserError, match=r"bad.toml: not valid TOML: .*line 2"):
        load_plan(p, PARTS)


def test_above_rated_refused_unless_allowed(tmp_path):
    s = [{"sample_id": "A", "part_id": "BD-1001", "channel": 1}]  # rated 6.3 V
    with pytest.raises(UserError, match=r"8 V exceeds the rated voltage 6.3 V of part BD-1001.*allow_above_rated"):
        _load(tmp_path, samples=s, bias={"stop_V": 8.0})
    plan = _load(tmp_path, samples=s, bias={"stop_V": 8.0}, limits={"allow_above_rated": True})
    assert plan.max_abs_bias_V(6.3) == 8.0


def test_beyond_supply_range_refused(tmp_path):
    plan = _load(tmp_path, bias={"stop_V": 70.0, "step_V": 10.0}, limits={"allow_above_rated": True})
    with pytest.raises(UserError, match=r"beyond the supply's range -60 .. 60 V"):
        build_sweeps(plan, [SampleRef("A", "BD-1008", 8)], PARTS, (-60.0, 60.0))


def test_unknown_part_and_channel(tmp_path):
    with pytest.raises(UserError, match="part 'BD-9999' is not in the parts catalogue"):
        _load(tmp_path, samples=[{"sample_id": "A", "part_id": "BD-9999", "channel": 1}])
    plan = _load(tmp_path, samples=[{"sample_id": "A", "part_id": "BD-1001", "channel": 9}])
    with pytest.raises(UserError, match="channel 9 is not in the bench file"):
        resolve_samples(plan, [SampleRef("X", "BD-1001", 1)])


def test_missing_plan_file():
    with pytest.raises(UserError, match="plan file not found"):
        load_plan(Path("/nonexistent/plan.toml"), PARTS)
