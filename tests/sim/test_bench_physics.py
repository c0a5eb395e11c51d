"""The coupled bench (demo parts, real physics) through pyvisa-py: what a sweep will see.

Sources: handbook relations of impedance measurement (level divider V_dut = V_osc*|Zx|/
|R_src + Zx|, D = w*Cs*Rs, Z of a series Cs-Rs); circuit relations of RC charging; the CV/CC
behaviour of a bench supply (common practice); the demo data in data/*.toml (invented).
"""

from __future__ import annotations

import math
import tomllib

import pytest

from instruments.clock import VirtualClock
from instruments.sim import SimBench
from instruments.sim.fixture import Wiring
from benchkit.commands.sim import demo_bench


@pytest.fixture
def bench():
    with demo_bench(clock=VirtualClock()) as b:
        yield b


@pytest.fixture
def inst(rm, bench):
    opened = {role: rm.open_resource(res, read_termination="\n", write_termination="\n",
                                     timeout=3000, open_timeout=3000)
              for role, res in bench.resources.items()}
    yield opened
    for res in opened.values():
        res.close()


def sync(res):
    """Writes are not waited for; a query makes sure the bench has done them (IEEE 488.2 *OPC?)."""
    assert res.query("*OPC?") == "1"


def fetch(meter):
    return tuple(float(x) for x in meter.query("READ?").split(","))


@pytest.mark.parametrize("channel,freq,level", [(1, "1E3", "1.0"), (5, "1E3", "1.0"),
                                                (5, "120", "0.5")])
def test_level_across_a_large_part_is_far_below_the_set_level(inst, channel, freq, level):
    # handbook relation: V_dut = V_osc*|Zx|/|R_src + Zx| with R_src = 100 ohm and
    # Zx = Rs + 1/(j*w*Cs); science notes item 6.6 [derived]: 10 uF at 1 kHz gives 0.157 V of 1 V
    m, sc = inst["meter"], inst["scanner"]
    sc.write(f"ROUT:CLOS (@{channel})")
    sync(sc)
    m.write(f"FUNC CSRS;:SOUR:FREQ {freq};:SOUR:VOLT {level}")
    Cs, Rs = fetch(m)
    ac = float(m.query("MEAS:VOLT:AC?"))
    w = 2 * math.pi * float(freq)
    Zx = complex(Rs, -1 / (w * Cs))
    assert ac == pytest.approx(float(level) * abs(Zx) / abs(100 + Zx), rel=2e-3)
    assert ac < 0.5 * float(level)


def test_supply_output_off_reads_zero_volts(inst, bench):
    # COMMANDS.md / common practice: the supply reads 0 V and 0 A with its output off
    s, sc = inst["supply"], inst["scanner"]
    sc.write("ROUT:CLOS (@1)")
    sync(sc)
    s.write("VOLT 5;OUTP OFF")
    assert float(s.query("MEAS:VOLT?")) == 0.0
    assert float(s.query("MEAS:CURR?")) == 0.0
    assert bench.supply_state() == {"set_V": 5.0, "output_on": False, "terminal_V": 0.0}
    assert bench.part_voltage_V(1) == 0.0


def test_charging_current_after_a_step_then_only_leakage(inst, bench):
    # handbook relation (RC charging): at t = 0+ an uncharged capacitor is a short, so the
    # current is Vs/R_feed; it then decays, leaving the leakage current V/R_ins
    s, sc = inst["supply"], inst["scanner"]
    sc.write("ROUT:CLOS (@1)")
    sync(sc)
    s.write("VOLT 0;OUTP ON")
    s.write("VOLT 5")
    sync(s)
    currents = [float(s.query("MEAS:CURR?"))]
    assert currents[0] == pytest.approx(5.0 / Wiring().feed_R_ohm, rel=1e-9)
    for _ in range(6):
        bench.clock.sleep(0.005)
        currents.append(float(s.query("MEAS:CURR?")))
    assert all(a > b for a, b in zip(currents, currents[1:]))
    bench.clock.sleep(60)
    leak = bench.fixture.part(1).leakage_current_A(5.0)
    assert float(s.query("MEAS:CURR?")) == pytest.approx(leak, rel=2e-3)
    assert float(s.query("MEAS:VOLT?")) == 5.0
    assert bench.part_voltage_V(1) == pytest.approx(5.0, rel=2e-3)


def test_current_limit_sags_the_terminal_voltage(inst, bench):
    # common practice (CV/CC crossover): in its limit the supply delivers the limit current
    # and its terminal voltage sags to V_part + I_lim*R_feed; it recovers once charged
    s, sc = inst["supply"], inst["scanner"]
    sc.write("ROUT:CLOS (@5)")   # 22 uF (data/parts.toml BD-1005)
    sync(sc)
    s.write("CURR 0.0001;VOLT 0;OUTP ON")
    s.write("VOLT 8")
    sync(s)
    V_term = float(s.query("MEAS:VOLT?"))
    assert V_term == pytest.approx(bench.part_voltage_V(5) + 1e-4 * Wiring().feed_R_ohm)
    assert V_term < 2.0
    assert float(s.query("MEAS:CURR?")) == pytest.approx(1e-4)
    bench.clock.sleep(0.2)
    assert 1.0 < float(s.query("MEAS:VOLT?")) < 8.0   # still sagging, part charging
    bench.clock.sleep(60)
    assert float(s.query("MEAS:VOLT?")) == 8.0
    assert bench.supply_state()["terminal_V"] == 8.0


def test_open_channel_keeps_the_charge(inst, bench):
    # common practice (safety): a charged capacitor disconnected from the supply stays
    # charged, losing it only through its insulation resistance
    s, sc = inst["supply"], inst["scanner"]
    sc.write("ROUT:CLOS (@4)")   # 1 uF, insulation R*C = 500 s (data/parts.toml BD-1004)
    sync(sc)
    s.write("VOLT 10;OUTP ON")
    sync(s)
    bench.clock.sleep(10)
    sc.write("ROUT:OPEN:ALL")
    s.write("OUTP OFF")
    sync(s)
    sync(sc)
    V0 = bench.part_voltage_V(4)
    assert V0 == pytest.approx(10.0, rel=1e-3)
    bench.clock.sleep(5)
    V1 = bench.part_voltage_V(4)
    assert 0.9 * V0 < V1 < V0
    # closing it again onto the output-off supply discharges it through the bleeder
    sc.write("ROUT:CLOS (@4)")
    sync(sc)
    bench.clock.sleep(60)
    assert bench.part_voltage_V(4) < 0.01


def test_settled_reading_agrees_with_the_truth(inst, bench):
    # the bench's own oracle: after a long dwell a reading equals the settled truth within
    # the noise and the slow bias aging (physics.py: true_settled_C_F leaves that out)
    m, s, sc = inst["meter"], inst["supply"], inst["scanner"]
    sc.write("ROUT:CLOS (@2)")
    sync(sc)
    s.write("VOLT 3;OUTP ON")
    sync(s)
    bench.clock.sleep(120)
    readings = [fetch(m)[0] for _ in range(5)]
    mean = sum(readings) / len(readings)
    truth = bench.true_settled_C_F(2, 3.0, "rising", freq_Hz=1e3, ac_level_Vrms=1.0)
    assert mean == pytest.approx(truth, rel=3e-3)
    # and DC bias lowers the capacitance of a class-2 part (common practice)
    assert truth < bench.true_settled_C_F(2, 0.0)


def test_chamber_temperature_reaches_thermometer_and_parts(inst, bench):
    # design: the part physics is read at the chamber temperature the thermometer reports
    m, sc, th = inst["meter"], inst["scanner"], inst["thermometer"]
    sc.write("ROUT:CLOS (@1)")
    sync(sc)
    at25 = sum(fetch(m)[0] for _ in range(3)) / 3
    bench.set_temperature(85.0)
    assert abs(float(th.query("MEAS:TEMP?")) - 85.0) < 0.2
    at85 = sum(fetch(m)[0] for _ in range(3)) / 3
    expected = bench.true_settled_C_F(1, 0.0, temp_C=85.0) / bench.true_settled_C_F(1, 0.0)
    assert at85 / at25 == pytest.approx(expected, rel=2e-3)
    assert expected != pytest.approx(1.0, abs=1e-3)


def test_bench_file_parses_and_names_every_instrument_and_sample(bench):
    # contract section 4: [instrument.<role>] resource/profile, [[channel]] entries
    doc = tomllib.loads(bench.bench_file_text())
    assert set(doc["instrument"]) == {"meter", "supply", "scanner", "thermometer", "chamber"}
    for role, entry in doc["instrument"].items():
        assert entry["resource"] == bench.resources[role]
        assert entry["profile"].startswith("generic-")
    assert [c["channel"] for c in doc["channel"]] == list(range(1, 9))
    first = doc["channel"][0]
    assert {k: first[k] for k in ("channel", "sample_id", "part_id")} == \
        {"channel": 1, "sample_id": "FX-01", "part_id": "BD-1001"}
    # the sample's age since its last heat, for the aging law (common practice to log it)
    assert first["hours_since_heat_h"] == pytest.approx(bench.fixture.part(1).hours_since_heat_h(), rel=1e-5)


def test_lot_bench_puts_each_sample_on_its_channel(rm):
    # data/lot.toml (invented): six samples of BD-1004, each with its own C_scale
    from benchkit.catalogue import DEMO_LOT, load_lot

    lot = {s.channel: s for s in load_lot(DEMO_LOT)}
    with demo_bench(clock=VirtualClock(), lot=True) as b:
        doc = tomllib.loads(b.bench_file_text())
        assert [(c["channel"], c["sample_id"]) for c in doc["channel"]] == \
            [(ch, lot[ch].sample_id) for ch in sorted(lot)]
        m = rm.open_resource(b.resources["meter"], read_termination="\n",
                             write_termination="\n", timeout=3000)
        sc = rm.open_resource(b.resources["scanner"], read_termination="\n",
                              write_termination="\n", timeout=3000)
        try:
            means = {}
            for ch in (1, 2):
                sc.write("ROUT:OPEN:ALL")
                sc.write(f"ROUT:CLOS (@{ch})")
                sync(sc)
                means[ch] = sum(fetch(m)[0] for _ in range(3)) / 3
        finally:
            m.close()
            sc.close()
    assert means[1] / means[2] == pytest.approx(lot[1].C_scale / lot[2].C_scale, rel=5e-3)


def test_same_seed_same_readings(rm):
    # common practice for simulators: a seeded bench repeats itself exactly
    def first_readings(seed):
        with demo_bench(clock=VirtualClock(), seed=seed) as b:
            m = rm.open_resource(b.resources["meter"], read_termination="\n",
                                 write_termination="\n", timeout=3000)
            sc = rm.open_resource(b.resources["scanner"], read_termination="\n",
                                  write_termination="\n", timeout=3000)
            try:
                sc.write("ROUT:CLOS (@3)")
                sync(sc)
                return [m.query("READ?") for _ in range(3)]
            finally:
                m.close()
                sc.close()

    assert first_readings(7) == first_readings(7)
    assert first_readings(7) != first_readings(8)
