"""Temperature plans on the simulated bench: visits, soak, bias off in transitions, the way out.

Sources: soak until the chamber is stable within a band and the reading's drift per minute is
below a limit (the part lags the air) [common practice, from memory]; one direction of visits
(thermal hysteresis near the Curie point) [common practice]; on every way out the bias ends at
0 V with the output off and the chamber goes to a safe temperature [common practice].
"""

from __future__ import annotations

import pytest

from benchkit.errors import UserError
from benchkit.sweep import resume_sweep, run_sweep
from benchkit.sweep.runlog import read_run
from instruments.drivers import BiasSupply, TemperatureChamber

from sweep_helpers import read_rows
from temp_helpers import ArmAfter, SoakInterruptClock, chamber_bench, write_temp_plan


def test_every_sample_is_swept_at_every_temperature_in_order(tmp_path):
    plan = write_temp_plan(tmp_path / "plan.toml", points=(85.0, 25.0, -55.0), order="ascending")
    with chamber_bench() as bench:
        res = run_sweep(bench, plan, tmp_path / "run", handle_signals=False)
        final = bench.chamber_state()
        supply = bench.supply_state()
    assert res.status == "complete"
    rows = read_rows(tmp_path / "run")
    # 3 temperatures x 2 samples x 3 biases, coldest first (order = ascending)
    temps = [float(r["temp_C"]) for r in rows]
    assert len(rows) == 18
    visits = [temps[0], temps[6], temps[12]]
    assert all(abs(t - T) <= 1.0 for t, T in zip(visits, (-55.0, 25.0, 85.0)))
    for k, T in enumerate((-55.0, 25.0, 85.0)):
        # the thermometer on the fixture reads the set point once the soak is over
        assert all(abs(t - T) <= 1.0 for t in temps[6 * k: 6 * k + 6])   # band_C
    keys = [(r["sample_id"], r["step_index"]) for r in rows]
    assert len(set(keys)) == len(keys)                   # one key per point
    meta = read_run(tmp_path / "run")
    ev = [e["event"] for e in meta["events"]]
    assert ev.count("temperature_start") == 3 and ev.count("soak_settled") == 3
    assert ev.index("chamber_safe") < ev.index("complete")
    assert meta["chamber_final"] == {"setpoint_C": 25.0, "confirmed": True}
    assert final["setpoint_C"] == 25.0                   # the chamber itself (test oracle)
    assert supply["output_on"] is False and supply["set_V"] == 0.0


def test_the_soak_waits_for_the_part_not_only_the_chamber(tmp_path):
    # at the chamber's "stable" the part still lags; the C-drift criterion waits it out
    plan = write_temp_plan(tmp_path / "plan.toml", points=(25.0, 125.0))
    with chamber_bench() as bench:
        run_sweep(bench, plan, tmp_path / "run", handle_signals=False)
    ev = {(e["event"], e.get("setpoint_C")): e for e in read_run(tmp_path / "run")["events"]}
    stable, settled = ev[("soak_chamber_stable", 125.0)], ev[("soak_settled", 125.0)]
    assert settled["t_s"] - stable["t_s"] > 300.0        # minutes after the air was stable
    assert abs(settled["fixture_C"] - 125.0) < 0.3


@pytest.mark.parametrize("how, output", [("off", False), ("on-at-0V", True)])
def test_bias_while_the_chamber_moves(tmp_path, how, output):
    path = tmp_path / "plan.toml"
    write_temp_plan(path, points=(25.0, 85.0))
    if how != "off":
        path.write_text(path.read_text().replace('ramp_rate_C_per_min = 6.0',
                                                 f'ramp_rate_C_per_min = 6.0\nbias_during_transition = "{how}"'))
    from benchkit.sweep.plan import load_plan

    plan = load_plan(path)
    assert plan.data["temperature"]["bias_during_transition"] == how
    seen = []
    with chamber_bench() as bench:
        real = bench.fixture.chamber.set_target

        def spy(T):
            seen.append((T, bench.fixture.output_on, bench.fixture.set_V))
            real(T)

        bench.fixture.chamber.set_target = spy
        run_sweep(bench, plan, tmp_path / "run", handle_signals=False)
    moves = [s for s in seen if s[0] == 85.0]
    assert moves and all(on is output and v == 0.0 for _, on, v in moves)   # 0 V either way


def test_a_temperature_plan_needs_a_chamber(tmp_path):
    from benchkit.sweep.benchfile import parse_bench_text

    plan = write_temp_plan(tmp_path / "plan.toml")
    with chamber_bench() as bench:
        text = bench.bench_file_text()
        cut = text.index("[instrument.chamber]")
        rest = text.index("[[channel]]")
        no_chamber = parse_bench_text(text[:cut] + text[rest:], "bench")
        with pytest.raises(UserError, match=r"no chamber; add \[instrument.chamber\]"):
            run_sweep(no_chamber, plan, tmp_path / "run", handle_signals=False)
    assert not (tmp_path / "run").exists()


@pytest.mark.parametrize("text, match", [
    ("points_C = [25.0, 27.0]", "closer than 5 degC"),
    ("points_C = []", "non-empty list"),
    ("points_C = [25.0]\nsafe_C = 90.0", "safe_C"),
    ("points_C = [25.0]\norder = \"random\"", "order"),
    ("points_C = [25.0]\nbias_during_transition = \"hold\"", "bias_during_transition"),
    ("points_C = [25.0]\nsoak = { stable_s = 100.0, max_soak_s = 50.0 }", "max_soak_s"),
    ("points_C = [25.0]\ncolour = 1", "unknown field"),
])
def test_bad_temperature_tables_are_one_clear_line(tmp_path, text, match):
    from benchkit.sweep.plan import parse_plan

    raw = {"bias": {"start_V": 0.0, "stop_V": 1.0, "step_V": 1.0}, "measure": {"dwell_s": 1.0},
           "limits": {"current_limit_A": 0.01, "max_ramp_V_per_s": 1.0, "discharge_wait_s": 0.1}}
    import tomllib
    raw["temperature"] = tomllib.loads(text)
    with pytest.raises(UserError, match=match):
        parse_plan(raw, "plan.toml")


def test_sigint_during_a_soak_bias_off_first_chamber_safe_points_kept_resume_continues(
        tmp_path, monkeypatch):
    plan = write_temp_plan(tmp_path / "plan.toml", points=(25.0, 85.0))
    order = []
    real_off, real_safe = BiasSupply.safe_off, TemperatureChamber.safe_return

    def off(self, *a, **k):
        order.append("bias_off")
        return real_off(self, *a, **k)

    def safe(self, *a, **k):
        order.append("chamber_safe")
        return real_safe(self, *a, **k)

    monkeypatch.setattr(BiasSupply, "safe_off", off)
    monkeypatch.setattr(TemperatureChamber, "safe_return", safe)
    clock = SoakInterruptClock(poll_s=30.0)
    with chamber_bench(clock) as bench:
        res = run_sweep(bench, plan, tmp_path / "run", clock, ArmAfter(clock, 6))
        supply, chamber = bench.supply_state(), bench.chamber_state()
    assert clock.fired_at is not None
    assert res.status == "aborted" and res.exit_code == 1
    assert "SIGINT" in res.reason and "during the soak at 85 degC" in res.reason
    assert order[:2] == ["bias_off", "chamber_safe"]
    assert supply["output_on"] is False and supply["set_V"] == 0.0
    assert chamber["setpoint_C"] == 25.0
    meta = read_run(tmp_path / "run")
    assert meta["status"] == "aborted" and meta["chamber_final"]["confirmed"] is True
    rows = read_rows(tmp_path / "run")
    assert len(rows) == 6 and all(abs(float(r["temp_C"]) - 25.0) <= 1.0 for r in rows)

    # resume: continues at the temperature it left (85 degC), every point once
    with chamber_bench(clock) as bench:
        res2 = resume_sweep(tmp_path / "run", bench, clock, handle_signals=False)
    assert res2.status == "complete" and res2.n_new == 6
    rows = read_rows(tmp_path / "run")
    assert len(rows) == 12 and all(abs(float(r["temp_C"]) - 85.0) <= 1.0 for r in rows[6:])
    ev = read_run(tmp_path / "run")["events"]
    after = [e for e in ev[[e["event"] for e in ev].index("resume"):] if e["event"] == "temperature_start"]
    assert [e["setpoint_C"] for e in after] == [85.0]
