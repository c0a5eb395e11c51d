"""Adaptive bias steps (benchkit/sweep/adaptive.py) on the physics of the simulated part.

Facts the checks rest on: a class-2 part is hysteretic (Miller-type branches [published:
S. L. Miller et al., J. Appl. Phys. 68, 6463 (1990)]), so within a branch the bias moves one
way only; the deviation of a chord from a curve over a gap h is |C''|*h^2/8 (the linear
interpolation error bound [published: numerical analysis texts, e.g. Burden & Faires,
from memory]), so a curve that bends needs closer points; the truth is the simulator's
noise-free settled curve (SimulatedPart.true_settled_C_F), not the fit.
"""

import numpy as np
import pytest

from benchkit.sweep.adaptive import (
    STOP_BUDGET, STOP_RESOLUTION, STOP_TARGET, AdaptiveSettings, LoopPlanner, MeasuredPoint, fit_branch,
    branch_data, pooled_sigma,
)
from benchkit.sweep.settle import SettleDetector

from bench_time_helpers import PhysicsBench, part_spec, run_adaptive

SETTLE = SettleDetector(0.01, 60.0, 0.5)  # the plan values of the issue
SETTINGS = AdaptiveSettings(target_band_pct_of_C0=0.5, max_points=40, coarse_points=7)


def adaptive_run(spec, settings=SETTINGS, seed=0):
    bench = PhysicsBench(spec, seed)
    planner = LoopPlanner(spec.rated_V, settings)
    points, passes, last = run_adaptive(bench, planner, SETTLE)
    return bench, planner, points, passes, last


@pytest.fixture(scope="module")
def sharp_knee():
    # a 50 V part whose capacitance falls within its first 10 V and is nearly flat above
    # (low characteristic field): the knee and the flat tail of the issue
    spec = part_spec("BD-1007", char_field_V_per_m=0.3e6, bias_floor_frac=0.3)
    return (spec,) + adaptive_run(spec)


EVEN = AdaptiveSettings(target_band_pct_of_C0=0.5, max_points=40, coarse_points=7, coarse_spacing="even")


def test_first_pass_is_an_even_coarse_loop():
    p = LoopPlanner(6.3, EVEN).first_pass()
    rising = [v for b, v in p.points if b == "rising"]
    falling = [v for b, v in p.points if b == "falling"]
    assert rising == pytest.approx(np.linspace(0, 6.3, 7))  # coarse_points from 0 V to the top
    assert falling == pytest.approx(np.linspace(0, 6.3, 7)[-2::-1])  # back down, top = the turn
    neg = LoopPlanner(-10.0, EVEN).first_pass()
    assert max(v for _, v in neg.points) == 0.0 and min(v for _, v in neg.points) == -10.0


def test_bias_moves_one_way_within_each_branch_of_every_pass(sharp_knee):
    _, _, _, _, passes, _ = sharp_knee
    assert len(passes) >= 2
    for p in passes:
        rising = [abs(v) for b, v in p.points if b == "rising"]
        falling = [abs(v) for b, v in p.points if b == "falling"]
        assert rising == sorted(rising) and len(set(rising)) == len(rising)
        assert falling == sorted(falling, reverse=True) and len(set(falling)) == len(falling)
        kinds = [b for b, _ in p.points]
        assert kinds == sorted(kinds, key=lambda b: b != "rising")  # rising leg, then falling


def test_more_points_per_volt_in_the_knee_than_in_the_flat_tail(sharp_knee):
    spec, bench, _, points, _, _ = sharp_knee
    V = np.linspace(0.0, spec.rated_V, 501)
    C = np.array([bench.part.true_settled_C_F(v, "rising", None) for v in V])
    bend = np.abs(np.gradient(np.gradient(C, V), V))
    knee = (0.0, 12.5)
    tail = (25.0, 50.0)
    # the truth bends much more in the knee than in the tail (chord error |C''| h^2/8)
    assert bend[(V >= 2.0) & (V <= knee[1])].max() > 10 * bend[V >= tail[0]].max()
    mags = np.array([abs(p.bias_V) for p in points])
    per_V = {name: np.sum((mags >= lo) & (mags <= hi)) / (hi - lo)
             for name, (lo, hi) in (("knee", knee), ("tail", tail))}
    assert per_V["knee"] > 1.5 * per_V["tail"], per_V


def test_refinement_rising_points_stay_above_the_remanent_bias(sharp_knee):
    _, _, planner, _, passes, _ = sharp_knee
    assert planner.remanent_V is not None
    for p in passes[1:]:
        assert all(abs(v) >= abs(planner.remanent_V) for b, v in p.points if b == "rising")


def test_stops_at_the_point_budget():
    spec = part_spec("BD-1004")
    settings = AdaptiveSettings(target_band_pct_of_C0=0.001, max_points=18, coarse_points=5)
    _, _, points, passes, last = adaptive_run(spec, settings)
    assert last.stop_reason == STOP_BUDGET
    assert len(points) == 18 and len(passes) >= 2  # the budget counts every point of the sample


def test_stops_when_the_band_is_inside_the_target():
    spec = part_spec("BD-1008")  # C0G: flat, the coarse loop already pins it down
    _, _, points, passes, last = adaptive_run(spec, AdaptiveSettings(5.0, 40, 7, coarse_spacing="even"))
    assert last.stop_reason == STOP_TARGET and len(passes) == 1 and len(points) == 13
    assert all(st.band_pct_of_C0 <= 5.0 for st in last.status.values())
    # stepped (the default): a flat part's steps grow from half the even step to the even
    # step (at most 1.5 times the one before) and stay there
    _, planner, points, passes, last = adaptive_run(spec, AdaptiveSettings(5.0, 40, 7))
    assert last.stop_reason == STOP_TARGET and planner.passes_measured == 1
    rising = [abs(p.bias_V) for p in points if p.branch == "rising"]
    h = spec.rated_V / 6
    steps, res = np.diff(rising), planner.resolution_V
    assert steps[0] == pytest.approx(h / 2, abs=res)
    assert steps[1:-1] == pytest.approx(np.minimum(1.5 * steps[:-2], h), abs=2 * res)
    assert 0 < steps[-1] <= h + res and rising[-1] == spec.rated_V


def run_first_loop(C_of_V, top_V, settings):
    """The stepped first loop on a noise-free curve: the planner's own points, measured."""
    planner = LoopPlanner(top_V, settings)
    plan = planner.first_pass()
    points, totals = [], []
    while plan.index == 1 and plan.points:
        totals.append(len(points) + len(plan.points) + planner.least_points_ahead)
        points += [MeasuredPoint(b, v, float(C_of_V(v, b)), 1e-12) for b, v in plan.points]
        plan = planner.next_pass(points)
    planner.totals = totals  # what a progress line would have shown as its total
    return planner, points


def test_stepped_first_loop_puts_short_steps_where_C_changes_fast():
    # rational law C0/(1 + (V/Vh)^2): C(Vh) = C0/2, |dC/dV| largest at Vh/sqrt(3), falling
    # above [derived]; a 6 V top over Vh = 1 V is the steep low-voltage part of the issue
    C0, Vh, top = 10e-6, 1.0, 6.0
    law = lambda v, b: C0 / (1.0 + (v / Vh) ** 2)
    s = AdaptiveSettings(0.5, 40, 7, coarse_step_pct_of_C0=15.0)
    planner, points = run_first_loop(law, top, s)
    rising = np.array([p.bias_V for p in points if p.branch == "rising"])
    falling = [p.bias_V for p in points if p.branch == "falling"]
    assert rising[0] == 0.0 and rising[-1] == top and np.all(np.diff(rising) > 0)
    steps = np.diff(rising)
    assert steps[:-1].max() <= top / 6 + 1e-9  # never longer than the even loop's step,
    assert steps[-1] <= 1.5 * top / 6 + 1e-9  # but the last, which leaves no sliver
    assert falling == list(rising[-2::-1])  # back down at the rising biases
    # above Vh |dC/dV| only falls, so a step sized from the one before changes C by at most
    # the aim (mean value theorem [published: any calculus text; from memory])
    C = law(rising, "rising")
    tail = rising[:-1] >= Vh
    assert np.all(np.abs(np.diff(C))[tail] / C0 <= 0.15 + 1e-9)
    # more points per volt over the knee than over the tail, unlike an even loop
    per_V = lambda lo, hi: np.sum((rising >= lo) & (rising <= hi)) / (hi - lo)
    assert per_V(0.0, 2.0) > 2 * per_V(3.0, 6.0)
    assert len(rising) > 7
    # the progress total: never above the loop's final count, and the even loop's at first
    # (2 * coarse_points - 1 points: every step at most the even one, the last 1.5 of it)
    assert planner.totals[0] == 13 and max(planner.totals) <= len(points)
    assert planner.totals[-1] == len(points)
    # control: the even loop has the same density everywhere
    even = LoopPlanner(top, AdaptiveSettings(0.5, 40, 7, coarse_spacing="even")).first_pass()
    ev = np.array([v for b, v in even.points if b == "rising"])
    assert np.sum(ev <= 2.0) / 2.0 <= 2 * np.sum(ev >= 3.0) / 3.0


def test_stepped_first_loop_of_a_negative_polarity_mirrors_the_positive_one():
    C0, Vh = 10e-6, 2.0
    law = lambda v, b: C0 / (1.0 + (v / Vh) ** 2)  # even in V [derived]
    s = AdaptiveSettings(0.5, 40, 7)
    _, pos = run_first_loop(law, 10.0, s)
    _, neg = run_first_loop(law, -10.0, s)
    assert [(p.branch, -p.bias_V) for p in neg] == [(p.branch, p.bias_V) for p in pos]


def test_pooled_sigma_follows_an_absolute_and_a_relative_part():
    # sigma^2 = a^2 + (b*C)^2, the "% of reading + floor" form of an instrument
    # specification [common practice]; the pooled values against numpy's least squares on
    # the same (exactly solvable) system
    C = np.array([10.0, 8.0, 5.0, 3.0, 2.0, 1.2]) * 1e-6
    a, b = 0.012e-6, 0.002
    s = np.sqrt(a ** 2 + (b * C) ** 2)
    got = pooled_sigma(C, s)
    A = np.column_stack([np.ones_like(C), C * C]) / (s * s)[:, None]
    x, *_ = np.linalg.lstsq(A, np.ones_like(C), rcond=None)
    assert got == pytest.approx(np.sqrt(x[0] + x[1] * C * C), rel=1e-9)
    assert got == pytest.approx(s, rel=1e-6)
    # a settle prediction's points: a fixed fraction of C0 at every bias; pooling the
    # relative scatter instead would give the 0 V point several times its own sigma
    u = np.full(C.shape, 0.0015 * C[0])
    assert pooled_sigma(C, u) == pytest.approx(u, rel=1e-6)
    rel_pool = np.sqrt(np.mean((u / C) ** 2)) * C
    assert rel_pool[0] > 3 * u[0]
    # and the planner's fits weight the branch so
    pts = [MeasuredPoint("rising", float(v), float(c), float(x)) for v, c, x in zip(range(6), C, u)]
    _, _, sigma = branch_data(pts, "rising")
    assert sigma == pytest.approx(u, rel=1e-6)
    # a meter's scatter proportional to the reading stays so
    assert pooled_sigma(C, 1e-3 * C) == pytest.approx(1e-3 * C, rel=1e-6)


def test_adaptive_curves_agree_with_the_true_settled_curve():
    spec = part_spec("BD-1004")
    bench, planner, points, _, last = adaptive_run(spec)
    assert last.stop_reason == STOP_TARGET
    C0 = bench.part.true_settled_C_F(0.0, "rising", None)
    for branch in ("rising", "falling"):
        curve = fit_branch(points, branch).curve
        lo, hi = curve.valid_range_V
        V = np.linspace(lo, hi, 200)
        truth = np.array([bench.part.true_settled_C_F(v, branch, None,
                                                      turn_V=spec.rated_V if branch == "falling" else None)
                          for v in V])
        err = np.max(np.abs(curve.C(V) - truth)) / C0 * 100.0
        assert err <= 0.5, (branch, err)  # the accuracy target, % of C0


def test_a_band_that_no_new_point_can_narrow_gets_no_points():
    # the rising branch below remanent_V rests on the coarse loop (Miller-type history
    # [published: S. L. Miller et al., J. Appl. Phys. 68, 6463 (1990)]): a band in excess
    # only there is not narrowed by points elsewhere, so none are spent on it
    V = np.linspace(0.0, 6.0, 7)
    C = 1e-6 / (1.0 + (V / 3.0) ** 2)  # rational law, C(Vh) = C0/2 [derived]
    pts = [MeasuredPoint("rising", float(v), float(c), 1e-10) for v, c in zip(V, C)]
    def planner_with(band_in_gaps):
        planner = LoopPlanner(6.0, AdaptiveSettings(0.5, 40, 7), branches=("rising",))
        planner.first_pass()
        real = planner._assess

        def assess(branch, fit, points, C0):
            st, cands = real(branch, fit, points, C0)
            st.band_pct_of_C0 = 5.0  # as if the band were wide at 0 V, below the remanent bias
            return st, [(pri, mag, band_in_gaps) for pri, mag, _ in cands]  # the gaps above it

        planner._assess = assess
        return planner

    nxt = planner_with(0.1).next_pass(pts)
    assert nxt.points == [] and nxt.stop_reason == STOP_RESOLUTION
    # control: where the gaps' band exceeds the target, each such gap gets its point
    nxt = planner_with(1.0).next_pass(pts)
    assert len(nxt.points) == len(V) - 1  # one per gap between the coarse points


def test_planner_is_deterministic_for_a_replay():
    # the engine resumes an adaptive run by feeding a fresh planner the rows on disk
    spec = part_spec("BD-1006")
    _, planner, points, passes, _ = adaptive_run(spec)
    replay = LoopPlanner(spec.rated_V, SETTINGS)
    replay.first_pass()
    n = len(passes[0].points)
    nxt = replay.next_pass(points[:n])
    assert nxt.points == passes[1].points


def test_budget_below_the_coarse_loop_is_refused():
    with pytest.raises(ValueError, match="max_points"):
        AdaptiveSettings(0.5, max_points=10, coarse_points=7)
    with pytest.raises(ValueError, match="coarse_points"):
        AdaptiveSettings(0.5, max_points=40, coarse_points=2)
    with pytest.raises(ValueError, match="top bias"):
        LoopPlanner(0.0, SETTINGS)
    with pytest.raises(ValueError, match="coarse_spacing"):
        AdaptiveSettings(0.5, coarse_spacing="random")
    with pytest.raises(ValueError, match="coarse_step_pct_of_C0"):
        AdaptiveSettings(0.5, coarse_step_pct_of_C0=0.0)
    m = MeasuredPoint("rising", 1.0, 1e-6, None)
    assert m.sigma_F is None


def test_band_of_a_branch_ending_between_grid_points_is_finite():
    # 8.7 V is grid point 348 of 401 over 0..10 V, 8.700000000000001 in floating point
    # [IEEE 754 rounding, numpy.linspace]: just beyond a curve that ends at 8.7 V, where a
    # spline has no value; the band there must be the curve's end, not NaN (which fails
    # every comparison and passed for an unmet target)
    assert np.linspace(0.0, 10.0, 401)[348] > 8.7
    V = np.array([0.0, 0.85, 2.1, 3.75, 5.4, 7.05, 8.7])
    C = 22e-6 / (1.0 + (V / 4.0) ** 2)  # rational law [derived]
    pts = [MeasuredPoint("falling", float(v), float(c), 2e-9) for v, c in zip(V, C)]
    planner = LoopPlanner(10.0, AdaptiveSettings(0.5, 40, 7, model="spline"))
    fit = fit_branch(pts, "falling", "spline")
    assert fit.curve.valid_range_V[1] == 8.7
    st, _ = planner._assess("falling", fit, pts, float(C[0]))
    assert np.isfinite(st.band_pct_of_C0)
