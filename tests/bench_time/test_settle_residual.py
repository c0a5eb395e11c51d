"""The residual rule of settle detection (benchkit/sweep/settle.py): stop when the relaxation still
to come is small, estimated from the dwell's own readings.

The checks rest on the exponential relaxation after a bias step (dielectric absorption,
seconds to minutes [common practice]): C(t) = C_inf + A*exp(-t/tau), so the part of the
change still to come at time t is A*exp(-t/tau) = -tau*dC/dt [derived]. The reference for
the fit is scipy.optimize.curve_fit (an independent nonlinear least-squares fit of the same
law); the reference for the physics is the simulated part's own noise-free reading long
after the step (SimulatedPart.reading, not the detector).
"""

import math

import numpy as np
import pytest
from scipy.optimize import curve_fit

from benchkit.sweep.adaptive import (
    MIN_PASS_GAIN, STOP_STALLED, AdaptiveSettings, BranchStatus, LoopPlanner, PassPlan,
)
from benchkit.sweep.settle import SettleDetector, relaxation_residual

from bench_time_helpers import PhysicsBench, part_spec
from benchkit.commands.sim import demo_bench

STEP_V = 3.0  # 0 V -> 3 V on a 6.3 V X7R part (BD-1003): well into its knee


def synthetic(tau, A=0.01, n=30, dt=0.1, noise=1e-4, seed=0):
    """Readings of an exponential approach with meter noise (relative), and the truth."""
    rng = np.random.default_rng(seed)
    t = 1.0 + dt * np.arange(n)
    C_inf = 1e-6
    clean = C_inf * (1.0 + A * np.exp(-t / tau))
    return t, clean * (1.0 + noise * rng.standard_normal(n)), clean, C_inf


def test_fitted_time_constant_agrees_with_scipy_curve_fit():
    t, C, _, _ = synthetic(tau=2.0, A=0.02, n=40)
    popt, _ = curve_fit(lambda x, c, a, tau: c + a * np.exp(-x / tau), t, C,
                        p0=(C[-1], C[0] - C[-1], 1.0))
    est = relaxation_residual(t, C, max_tau_s=20.0)
    # grid of 40 log steps over 0.2..20 s: neighbours differ by 12 %
    assert est.tau_s == pytest.approx(popt[2], rel=0.15)
    remaining = abs(popt[1] * math.exp(-t[-1] / popt[2])) / popt[0] * 100.0
    assert est.residual_pct >= remaining  # a bound: never below the best fit's own residual


@pytest.mark.parametrize("tau", [0.5, 2.0, 5.0])
def test_the_bound_covers_the_true_residual(tau):
    # the residual still to come at the last reading, A*exp(-t_last/tau), by construction
    for seed in range(10):
        t, C, clean, C_inf = synthetic(tau, seed=seed)
        true_pct = 100.0 * (clean[-1] - C_inf) / C_inf
        est = relaxation_residual(t, C, max_tau_s=20.0)
        assert est.residual_pct >= true_pct, (seed, est, true_pct)


def test_flat_readings_give_a_bound_that_shrinks_with_more_of_them_and_a_drift_a_patient_one():
    rng = np.random.default_rng(1)
    t = np.arange(40) * 0.1
    flat = 1e-6 * (1.0 + 1e-4 * rng.standard_normal(t.size))
    # noise only: the bound is set by how well the readings pin the slope down, and that
    # improves as span^-1.5 with evenly spread readings [derived: s*sqrt(12/N)/W]
    short = relaxation_residual(t[:20], flat[:20], 20.0).residual_pct
    long = relaxation_residual(t, flat, 20.0).residual_pct
    assert long < short
    # a straight drift of 0.01 %/s is indistinguishable from a slow exponential: the bound
    # is at least about slope*max_tau_s [derived: A*exp(-t/tau) -> slope*tau for tau >> span]
    ramp = flat * (1.0 - 1e-4 * t)
    est = relaxation_residual(t, ramp, 20.0)
    assert est.residual_pct >= 0.5 * 0.01 * 20.0 and est.residual_pct > long
    with pytest.raises(ValueError):
        relaxation_residual(t[:5], flat[:5], 20.0)


def settled_C_after(bench, wait_s=60.0):
    """The noise-free reading after the relaxation has died away (many tau later)."""
    bench.clock.sleep(wait_s)
    return bench.C_true_now()


@pytest.mark.parametrize("tau", [1.5, 3.0, 6.0])
def test_on_the_simulated_part_the_residual_left_is_within_the_threshold(tau):
    spec = part_spec("BD-1003", tau_relax_s=tau)
    thr = 0.2
    for seed in range(4):
        b = PhysicsBench(spec, seed)
        b.ramp(STEP_V)
        det = SettleDetector(None, 60.0, min_dwell_s=1.0, window_s=1.0,
                             max_residual_pct_of_reading=thr)
        res = det.wait(b.clock, b.probe)
        assert not res.hit_max_dwell
        c_stop = b.C_true_now()
        left = abs(c_stop - settled_C_after(b)) / c_stop * 100.0
        assert left <= thr, (tau, seed, float(res), left)


def test_residual_rule_waits_longer_for_a_slower_dielectric_and_less_than_the_drift_rule():
    times = []
    for tau in (1.5, 3.0, 6.0):
        b = PhysicsBench(part_spec("BD-1003", tau_relax_s=tau))
        b.ramp(STEP_V)
        times.append(float(SettleDetector(None, 60.0, 1.0, 1.0,
                                          max_residual_pct_of_reading=0.2).wait(b.clock, b.probe)))
    assert times[0] < times[1] < times[2], times
    # the drift rule at 0.01 %/s leaves about 0.01*tau = 0.03 % at tau = 3 s: it waits longer
    b = PhysicsBench(part_spec("BD-1003"))
    b.ramp(STEP_V)
    drift_rule = float(SettleDetector(0.01, 60.0, 0.5).wait(b.clock, b.probe))
    assert times[1] < drift_rule


def test_residual_in_percent_of_C0_takes_the_sample_s_first_point():
    b = PhysicsBench(part_spec("BD-1003"))
    det = SettleDetector(None, 60.0, 1.0, 1.0, max_residual_pct_of_C0=0.2)
    det.start_sample()
    det.wait(b.clock, b.probe)  # at 0 V: C0
    c0 = det.reference_C_F
    assert c0 == pytest.approx(b.C_true_now(), rel=1e-3)
    b.ramp(5.0)  # far into the knee: the reading is well below C0
    det.wait(b.clock, b.probe)
    assert det.reference_C_F == c0  # kept for the rest of the sample
    det.start_sample()
    assert det.reference_C_F is None


def test_bad_residual_settings_are_refused():
    with pytest.raises(ValueError, match="max_residual_pct_of_reading"):
        SettleDetector(None, 10.0)
    with pytest.raises(ValueError, match="max_residual_pct_of_C0"):
        SettleDetector(None, 10.0, max_residual_pct_of_C0=-1.0)


def test_a_pass_that_does_not_narrow_the_band_is_not_repeated():
    planner = LoopPlanner(6.0, AdaptiveSettings())
    before = {"rising": BranchStatus("rising", 7, "tanh", 1.0, 1.0)}
    planner.history = [PassPlan(1, [("rising", 0.0)], None), PassPlan(2, [("rising", 1.0)], None, before)]
    barely = {"rising": BranchStatus("rising", 9, "tanh", 1.0 - 0.5 * MIN_PASS_GAIN, 1.0)}
    better = {"rising": BranchStatus("rising", 9, "tanh", 1.0 - 2 * MIN_PASS_GAIN, 1.0)}
    assert planner._stalled(barely, ["rising"])
    assert not planner._stalled(better, ["rising"])
    assert STOP_STALLED.startswith("no progress")


def test_plan_takes_a_residual_threshold_instead_of_a_drift_rate():
    from benchkit.errors import UserError
    from benchkit.sweep.plan import parse_plan

    raw = {"name": "t", "bias": {"points_V": [0.0, 4.0]},
           "measure": {"dwell": "settle", "n_readings": 3},
           "settle": {"max_residual_pct_of_C0": 0.2, "max_dwell_s": 60.0, "window_s": 1.0},
           "limits": {"current_limit_A": 0.01, "max_ramp_V_per_s": 5.0, "discharge_wait_s": 0.0}}
    p = parse_plan(raw, "plan.toml")
    det = SettleDetector.from_plan(p.settle)
    assert det.max_residual_pct_of_C0 == 0.2 and det.max_drift_pct_per_s is None
    assert det.max_tau_s == 20.0  # the default
    raw["settle"] = {"max_dwell_s": 60.0}
    with pytest.raises(UserError, match="settle.max_drift_pct_per_s"):
        parse_plan(raw, "plan.toml")


def test_sim_bench_truth_passes_the_turning_point_on():
    # the falling branch of a loop that turned at 4 V joins the full falling branch about
    # 2*Ec*d below the turn [published: S. L. Miller et al., J. Appl. Phys. 68, 6463 (1990)]
    from instruments.clock import VirtualClock
    from instruments.sim import SimBench

    with demo_bench(clock=VirtualClock()) as bench:
        part = bench.fixture.part(3)
        for v in (0.5, 3.9):
            got = bench.true_settled_C_F(3, v, "falling", turn_V=4.0)
            assert got == part.true_settled_C_F(v, "falling", turn_V=4.0)
        near_turn = bench.true_settled_C_F(3, 3.9, "falling", turn_V=4.0)
        assert near_turn != bench.true_settled_C_F(3, 3.9, "falling")  # None: from far out
