"""Settle detection (benchkit/sweep/settle.py) against the physics of the simulated part.

The checks rest on the relaxation law of the simulated dielectric: after a bias step the
part's capacitance approaches its new value as exp(-t/tau) (dielectric absorption after a
bias step, seconds to minutes [common practice]), so the drift rate falls below a threshold
r at t* = tau*ln(r0/r) [derived], later for a larger tau. t* is taken here from the
noise-free physics (SimulatedPart.reading), not from the detector.
"""

import math

import numpy as np
import pytest

from benchkit.sweep.settle import MAX_DWELL_FLAG, SettleDetector, window_drift

from bench_time_helpers import READ_S, PhysicsBench, part_spec

THR = 0.01  # percent per second, the plan value of the issue
STEP_V = 3.0  # 0 V -> 3 V on a 6.3 V X7R part: well into its knee


def true_settle_time_s(spec, bias_V, thr=THR, seed=0, dt=0.01):
    """First time after the step at which the noise-free drift |dC/dt|/C is below thr."""
    b = PhysicsBench(spec, seed)
    b.ramp(bias_V)
    t0, prev = b.clock.now(), b.C_true_now()
    for _ in range(100000):
        b.clock.sleep(dt)
        c = b.C_true_now()
        if abs(c - prev) / dt / c * 100.0 < thr:
            return b.clock.now() - t0
        prev = c
    raise AssertionError("the noise-free part never settled")


def settle_after_step(spec, seed=0, **kw):
    b = PhysicsBench(spec, seed)
    b.ramp(STEP_V)
    det = SettleDetector(kw.pop("thr", THR), kw.pop("max_dwell_s", 60.0),
                         kw.pop("min_dwell_s", 0.5), kw.pop("window_s", 2.0))
    return det.wait(b.clock, b.probe), b


def test_window_drift_is_the_least_squares_slope():
    # reference: numpy.polyfit (ordinary least squares) and the textbook standard error of
    # a regression slope, s/sqrt(sum (t - mean t)^2) [published: any regression text]
    rng = np.random.default_rng(3)
    t = np.arange(21) * 0.1
    C = 1e-6 * (1.0 + 2e-4 * t) * (1.0 + 1e-5 * rng.standard_normal(t.size))
    est = window_drift(t, C)
    slope, icept = np.polyfit(t, C, 1)
    resid = C - (slope * t + icept)
    se = math.sqrt(np.sum(resid**2) / (t.size - 2) / np.sum((t - t.mean()) ** 2))
    assert est.drift_pct_per_s == pytest.approx(100 * slope / C.mean(), rel=1e-9)
    assert est.u_drift_pct_per_s == pytest.approx(100 * se / C.mean(), rel=1e-6)
    assert est.drift_pct_per_s == pytest.approx(0.02, rel=0.05)  # 2e-4 per s = 0.02 %/s, by construction
    with pytest.raises(ValueError):
        window_drift([0.0, 0.1], [1.0, 1.0])


def test_slower_dielectric_settles_later_faster_earlier():
    # t* = tau*ln(r0/thr) grows with tau [derived from the exponential relaxation]
    taus = (1.5, 3.0, 6.0, 12.0)
    times = []
    for tau in taus:
        res, _ = settle_after_step(part_spec("BD-1003", tau_relax_s=tau))
        assert not res.hit_max_dwell and res.flags == ()
        times.append(float(res))
    assert times == sorted(times) and len(set(times)) == len(times), times
    # with the same tau the demo value (3 s) lies between a faster and a slower dielectric
    assert times[0] < times[1] < times[2]


@pytest.mark.parametrize("tau", [3.0, 6.0])
def test_stops_after_the_true_settle_time_not_fooled_by_noise(tau):
    # five meter-noise draws: never ends before the noise-free part is below the threshold
    # (0.5 s allowance: one standard error of the drift estimate), and not more than one
    # window plus one tau after it (the window's mean slope lags, the margin adds some)
    spec = part_spec("BD-1003", tau_relax_s=tau)
    t_true = true_settle_time_s(spec, STEP_V)
    for seed in range(5):
        res, _ = settle_after_step(spec, seed)
        assert t_true - 0.5 <= float(res) <= t_true + 2.0 + tau, (seed, float(res), t_true)
        assert abs(res.drift_pct_per_s) <= THR  # what it recorded is below the threshold


def test_part_without_relaxation_goes_on_after_one_window():
    # class 1 dielectric (C0G: no absorption worth the name [common practice]): the earliest
    # the rule can tell is one full window of readings
    res, _ = settle_after_step(part_spec("BD-1008"))
    assert 2.0 <= float(res) <= 2.0 + 2 * READ_S


def test_never_settling_part_ends_at_max_dwell_with_flag():
    # tau of 200 s with half the step's change relaxing: the drift starts near 0.05 %/s and
    # stays above 0.01 %/s for minutes [derived: r0 = a*dB/tau, then exp(-t/tau)], so a
    # 20 s maximum dwell is reached
    spec = part_spec("BD-1003", tau_relax_s=200.0, relax_amplitude_frac=0.5)
    res, bench = settle_after_step(spec, max_dwell_s=20.0)
    assert res.hit_max_dwell and res.flags == (MAX_DWELL_FLAG,)
    assert 20.0 <= float(res) <= 20.0 + 2 * READ_S
    assert abs(res.drift_pct_per_s) > THR  # and it says how fast it was still drifting
    # the true drift at the end agrees with the estimate within a factor of two
    c1 = bench.C_true_now()
    bench.clock.sleep(1.0)
    true_drift = (bench.C_true_now() - c1) / c1 * 100.0
    assert 0.5 < res.drift_pct_per_s / true_drift < 2.0


def test_overload_and_missing_readings_are_left_out():
    b = PhysicsBench(part_spec("BD-1008"))
    b.ramp(STEP_V)
    calls = {"n": 0}

    def probe():
        calls["n"] += 1
        c = b.probe()
        return 9.9e37 if calls["n"] % 3 == 0 else (math.nan if calls["n"] % 5 == 0 else c)

    res = SettleDetector(THR, 60.0).wait(b.clock, probe)
    assert not res.hit_max_dwell
    assert res.n_readings < calls["n"]  # the overloads (9.9E37, SCPI) and NaNs were not used
    assert abs(res.drift_pct_per_s) <= THR


def test_bad_settings_are_refused():
    with pytest.raises(ValueError, match="max_drift_pct_per_s"):
        SettleDetector(0.0, 10.0)
    with pytest.raises(ValueError, match="min_dwell_s"):
        SettleDetector(0.01, 1.0, min_dwell_s=2.0)
    with pytest.raises(ValueError, match="window_s"):
        SettleDetector(0.01, 10.0, window_s=-1.0)
